"""One writer at a time: an advisory ``flock(2)`` on the store's ``.lock`` file.

``flock`` locks belong to an open file description, so two opens of the lock file conflict even
inside one process, and the kernel drops the lock when its holder dies (also on ``SIGKILL``): a
crashed writer never leaves the store locked. One process therefore shares one
:class:`WriteLock` per lock file (:func:`shared_lock`): a thread that holds it re-enters it
through any store object of the same folder instead of waiting for itself, and other threads
queue on it. The holder writes its process id and its command
(``magfuse nightly``, ...) into the file so that a waiting writer can name it. POSIX only
(``fcntl``).

Every writer of a store (station magnitudes, model versions, the active pointer, fused runs,
nightly logs) holds this one lock, so a store-side ``OSError`` (read-only or full disk, a file
where a folder belongs) can only happen under it: :meth:`WriteLock.hold` turns it into one
:class:`~stations.errors.StoreWriteError` that names the store, never the input file.
"""

from __future__ import annotations

import errno
import fcntl
import os
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

from stations.errors import StoreBusyError, StoreWriteError

__all__ = ["WriteLock", "set_holder_command", "shared_lock", "store_write_error"]

#: What this process is, as the lock file records it for a waiting writer (see
#: :func:`set_holder_command`); by default the program name and its first argument.
_command: str = " ".join([Path(sys.argv[0]).name or "python", *sys.argv[1:2]]).strip()


def set_holder_command(command: str) -> None:
    """Name this process's command in the lock files it takes (e.g. ``magfuse nightly``)."""
    global _command
    _command = " ".join(command.split())  # one line


#: ``errno`` values that say "the store cannot be written here" rather than "a bug".
_STORE_ERRNOS = frozenset(
    {
        errno.EROFS,
        errno.ENOSPC,
        errno.EDQUOT,
        errno.EACCES,
        errno.EPERM,
        errno.EIO,
        errno.ENOTDIR,
        errno.EISDIR,
        errno.EEXIST,
        errno.EFBIG,
        errno.EMLINK,
        errno.ENAMETOOLONG,
    }
)


def store_write_error(root: Path, exc: OSError) -> StoreWriteError | None:
    """The one-line :class:`StoreWriteError` for an ``OSError`` raised while writing ``root``.

    None when the error is not one of a store that cannot be written (a missing file, for
    instance, is a different problem and keeps its own handling).
    """
    if exc.errno not in _STORE_ERRNOS:
        return None
    where = f" ({exc.filename})" if exc.filename else ""
    reason = exc.strerror or str(exc)
    return StoreWriteError(
        f"{root}: cannot write the store: {reason}{where}; nothing was lost, free disk space "
        "or make the store folder writable, then run the command again"
    )


#: Seconds between attempts while waiting; short enough to hand over quickly, long enough to
#: stay off the CPU.
_POLL_S = 0.05


class WriteLock:
    """Exclusive lock on one lock file, re-entrant for the thread that holds it.

    Threads sharing one instance queue on an in-process lock first (with the same timeout),
    so the file lock is never shared by accident; other instances and other processes queue
    on the file lock.

    Parameters
    ----------
    path : Path
        The lock file; created if missing, never removed (removing it would let two writers
        lock two different files).
    timeout_s : float
        Longest wait for another holder, in seconds; 0 fails at once.
    """

    def __init__(self, path: Path, timeout_s: float) -> None:
        self.path = path
        self.timeout_s = timeout_s
        self._fd: int | None = None
        self._depth = 0
        self._thread_lock = threading.RLock()

    @property
    def held(self) -> bool:
        """True while this instance holds the lock."""
        return self._depth > 0

    def _holder(self) -> str:
        """``another magfuse process (pid N, command C)`` from the lock file, as far as known."""
        try:
            lines = self.path.read_text(encoding="utf-8").splitlines()
        except (OSError, UnicodeDecodeError):
            lines = []
        pid = lines[0].strip() if lines and lines[0].strip().isdigit() else ""
        command = lines[1].strip() if len(lines) > 1 else ""
        details = ", ".join(
            part for part in (pid and f"pid {pid}", command and f"command {command}") if part
        )
        return f"another magfuse process ({details})" if details else "another magfuse process"

    def _busy(self, timeout_s: float) -> StoreBusyError:
        return StoreBusyError(
            f"{self.path.parent} is busy: {self._holder()} holds its writer lock; try again "
            f"later (waited {timeout_s:g} s; [store] lock_timeout_s sets the wait)"
        )

    def _tell(self, on_wait: Callable[[str], None] | None, timeout_s: float) -> bool:
        if on_wait is None or timeout_s <= 0:
            return False
        on_wait(
            f"{self.path.parent}: waiting up to {timeout_s:g} s for {self._holder()} to "
            "release the store's writer lock"
        )
        return True

    def acquire(
        self, on_wait: Callable[[str], None] | None = None, *, timeout_s: float | None = None
    ) -> None:
        """Take the lock, waiting up to ``timeout_s``; ``on_wait`` gets one message if it waits.

        Parameters
        ----------
        on_wait : callable, optional
            Receives one message if the lock is busy and the call waits.
        timeout_s : float, optional
            Longest wait in seconds (default: the instance's ``timeout_s``).

        Raises
        ------
        StoreBusyError
            If another holder keeps the lock longer than ``timeout_s``.
        """
        wait = self.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + wait
        told = False
        if not self._thread_lock.acquire(blocking=False):
            told = self._tell(on_wait, wait)
            if not self._thread_lock.acquire(timeout=wait):
                raise self._busy(wait)
        if self._depth:  # this thread already holds the file lock
            self._depth += 1
            return
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except BaseException:
            self._thread_lock.release()
            raise
        try:
            while True:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except BlockingIOError:
                    if time.monotonic() >= deadline:
                        raise self._busy(wait) from None
                    if not told:
                        told = self._tell(on_wait, wait)
                    time.sleep(min(_POLL_S, max(0.0, deadline - time.monotonic())))
        except BaseException:
            os.close(fd)
            self._thread_lock.release()
            raise
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n{_command}\n".encode(), 0)
        except OSError:
            pass  # the lock is held; only the holder's name for waiting writers is missing
        self._fd = fd
        self._depth = 1

    def release(self) -> None:
        """Give the lock back (the outermost release unlocks)."""
        if self._depth == 0:
            return
        self._depth -= 1
        try:
            if self._depth == 0 and self._fd is not None:
                fd, self._fd = self._fd, None
                try:
                    fcntl.flock(fd, fcntl.LOCK_UN)
                finally:
                    os.close(fd)
        finally:
            self._thread_lock.release()

    @contextmanager
    def hold(
        self, on_wait: Callable[[str], None] | None = None, *, timeout_s: float | None = None
    ) -> Iterator[None]:
        """Context manager around :meth:`acquire` / :meth:`release` (same parameters).

        Raises
        ------
        StoreBusyError
            If another holder keeps the lock longer than ``timeout_s``.
        StoreWriteError
            For an ``OSError`` of a store that cannot be written (read-only or full disk, a
            file where a folder belongs), raised while taking the lock or inside the block.
        """
        try:
            self.acquire(on_wait, timeout_s=timeout_s)
        except OSError as exc:
            raise (store_write_error(self.path.parent, exc) or exc) from None
        try:
            yield
        except OSError as exc:
            err = store_write_error(self.path.parent, exc)
            if err is None:
                raise
            raise err from exc
        finally:
            self.release()


#: This process's lock of each lock file (by real path), shared by every store object.
_SHARED: dict[str, WriteLock] = {}
_SHARED_GUARD = threading.Lock()


def shared_lock(path: Path, timeout_s: float = 30.0) -> WriteLock:
    """This process's :class:`WriteLock` of the lock file ``path`` (created on first use).

    Every store object of one folder gets the same instance, so a thread holding the lock
    re-enters it wherever it is taken again (no process waits for itself); each caller passes
    its own wait to :meth:`WriteLock.hold`.
    """
    key = os.path.realpath(path)
    with _SHARED_GUARD:
        lock = _SHARED.get(key)
        if lock is None:
            lock = _SHARED[key] = WriteLock(Path(path), timeout_s)
        return lock
