"""Check a whole store for damaged files: station magnitudes, model versions, fused runs.

Every file magfuse writes into a store carries a SHA-256 recorded where it was committed
(``manifest.json``, a version's ``checksums.json``, ``fused/manifest.json``) and, for Parquet,
a checksum per page (:mod:`stations.store.checksums`). :func:`verify_store` recomputes them all
and reads every page, so damage that no command has met yet is found before it matters.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from fusion.versions.fused_store import FusedStore
from fusion.versions.model_registry import ModelRegistry
from stations.store import StationMagnitudeStore
from stations.store.verify import Problem

__all__ = ["VerifyReport", "verify_store"]


@dataclass(frozen=True, slots=True)
class VerifyReport:
    """What :func:`verify_store` found.

    Attributes
    ----------
    root : str
        The store folder.
    checked : dict of str to int
        Files checked per part (``station magnitudes``, ``model versions``, ``fused``).
    problems : list of Problem
        Damaged or missing files (paths relative to ``root``); empty when all are intact.
    """

    root: str
    checked: dict[str, int] = field(default_factory=dict)
    problems: list[Problem] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """True when no file is damaged or missing."""
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        """Plain dict for JSON output."""
        return {
            "root": self.root,
            "ok": self.ok,
            "checked": dict(self.checked),
            "damaged": [{"path": p.path, "problem": p.problem} for p in self.problems],
        }


def verify_store(store: StationMagnitudeStore) -> VerifyReport:
    """Check every file of ``store`` and of the model versions and fused runs kept in it."""
    checked: dict[str, int] = {}
    problems: list[Problem] = []
    for part, (n, found) in (
        ("station magnitudes", store.verify()),
        ("model versions", ModelRegistry(store.root).verify()),
        ("fused magnitudes", FusedStore(store.root).verify()),
    ):
        checked[part] = n
        problems += found
    return VerifyReport(str(store.root), checked, problems)
