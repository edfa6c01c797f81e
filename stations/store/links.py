"""Refuse a store whose folders or files link out of it (symbolic links).

A store folder such as ``quarantine/``, ``data/`` or ``fused/ML`` that is a symbolic link to a
folder elsewhere makes every writer that tidies up (removing leftovers of an interrupted write)
delete files it never created, outside the store. magfuse therefore refuses, at open, a store
in which any entry is a symbolic link whose target lies outside the store's real path, and its
clean-up never removes anything whose real path is outside the store.

Links that stay inside the store are allowed (they cannot reach anything the store does not
own). The store root itself may be a link: its real path is what "inside" means.
"""

from __future__ import annotations

import os
from pathlib import Path

from stations.errors import StoreCorruptError

__all__ = ["check_no_outside_links", "inside"]


def inside(path: Path, real_root: Path) -> bool:
    """True if the real path of ``path`` (links resolved) is ``real_root`` or below it."""
    try:
        real = Path(os.path.realpath(path))
    except OSError:
        return False
    return real == real_root or real_root in real.parents


def check_no_outside_links(root: Path) -> None:
    """Raise if an entry below ``root`` is a symbolic link pointing outside the store.

    Walks the store without following links (one ``scandir`` per folder; a store has a few
    folders per magnitude type and month, so this is a few milliseconds even for a large
    store).

    Raises
    ------
    StoreCorruptError
        Naming the first such link and its target, and the fix.
    """
    real_root = Path(os.path.realpath(root))
    stack = [Path(root)]
    while stack:  # loop over folders, not rows
        folder = stack.pop()
        try:
            entries = list(os.scandir(folder))
        except (FileNotFoundError, NotADirectoryError):
            continue
        for entry in entries:
            if entry.is_symlink():
                path = Path(entry.path)
                if not inside(path, real_root):
                    target = os.readlink(path)
                    raise StoreCorruptError(
                        f"{path}: is a symbolic link to {target}, outside the store; magfuse "
                        "never writes or deletes through such a link. Replace it by a real "
                        "folder (move the files in) or point --store at the real location"
                    )
            elif entry.is_dir(follow_symlinks=False):
                stack.append(Path(entry.path))
