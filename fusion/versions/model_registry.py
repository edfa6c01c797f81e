"""Immutable station-model versions with an atomically switched active version.

Layout under the store root (one folder per magnitude type)::

    models/<magnitude_type>/
        versions/<version_id>/        immutable once renamed into place
            meta.json                 window, as-of, config hash, data fingerprint, code version,
                                      creation time, anchor, hyperparameters, convergence
            units.parquet             station units: bias, its variance, error variance, flags
            pairs.parquet             flagged pairs with the covariance used for fusion
            tables/<name>.parquet     the learned tables for people (stations, pairs, epochs)
        active.json                   {"version": ..., "history": [older active versions]}

A version folder is written under a temporary name, every file fsync'ed, then renamed in one
``os.rename``; the active pointer is replaced with ``os.replace`` after an fsync of the new
file. A crash (even ``kill -9``) at any point leaves the previous pointer or the new one, never
a mixture, and never a half-written version under its final name (POSIX rename atomicity).
Writers hold the store's write lock (the caller passes it).

A writer killed before its rename leaves its temporary folder (``versions/.<id>.<random>``).
Every writer that holds the lock removes such folders first: while it holds the lock no other
writer can be filling one, so any that exists is a leftover.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
import shutil
import tempfile
from collections.abc import Callable, Iterator, Mapping
from contextlib import AbstractContextManager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from stations import strict_json
from stations.errors import ConfigError, ModelNotFoundError, StoreCorruptError
from stations.schema import MagnitudeType, normalise_magnitude_type
from stations.store.atomic import fsync_dir, write_bytes_atomic
from stations.store.checksums import check_digest, sha256_of
from stations.store.verify import Problem, verify_files

__all__ = [
    "ModelRegistry",
    "ModelVersion",
    "check_magnitude_type",
    "check_version_id",
    "parameters_from_frames",
    "parameters_to_frames",
]

_ACTIVE = "active.json"
#: File of a version folder mapping each other file to its SHA-256 (stations.store.checksums).
_CHECKSUMS = "checksums.json"

#: A version id: ``<magnitude type>-<YYYYMMDD>T<HHMMSS>Z-<8 hex digits>`` (see ``save``).
_VERSION_ID = re.compile(
    r"^(?P<type>" + "|".join(re.escape(m.value) for m in MagnitudeType) + r")"
    r"-\d{8}T\d{6}Z-[0-9a-f]{8}$"
)


def check_magnitude_type(magnitude_type: str) -> str:
    """The canonical magnitude type, checked before it becomes a folder name.

    Raises
    ------
    ConfigError
        If ``magnitude_type`` is not a known type or alias (so a value such as ``../x``
        never reaches a path).
    """
    try:
        return normalise_magnitude_type(str(magnitude_type)).value
    except ValueError as exc:
        raise ConfigError(f"--type: {exc}") from None


def check_version_id(version_id: str) -> str:
    """Return ``version_id`` if it matches the version-id pattern, before it touches a path.

    Raises
    ------
    ModelNotFoundError
        If it is not ``TYPE-YYYYMMDDTHHMMSSZ-hash`` with a known magnitude type (e.g.
        ``../../outside/x-y``); the message says how to list the versions.
    """
    if not isinstance(version_id, str) or not _VERSION_ID.match(version_id):
        raise ModelNotFoundError(
            f"model version {version_id!r} is not a version id "
            "(TYPE-YYYYMMDDTHHMMSSZ-hash); list them with 'magfuse models'"
        )
    return version_id


@dataclass(frozen=True, slots=True)
class ModelVersion:
    """One stored model version: its id, metadata and folder."""

    version_id: str
    magnitude_type: str
    meta: Mapping[str, Any]
    path: Path

    @property
    def created(self) -> str:
        """Creation time (ISO 8601, UTC)."""
        return str(self.meta.get("created", ""))


def parameters_to_frames(params: StationParameters) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Station parameters as two plain tables (units, pairs) for Parquet."""
    units = pd.DataFrame(
        {
            "unit_id": params.unit_ids.astype(str),
            "station_id": params.station_ids.astype(str),
            "epoch_start": pd.to_datetime(params.epoch_start).tz_localize("UTC"),
            "epoch_end": pd.to_datetime(params.epoch_end).tz_localize("UTC"),
            "bias": params.bias,
            "bias_var": params.bias_var,
            "sigma2": params.sigma2,
            "prior_dominated": params.prior_dominated,
        }
    )
    ids = params.unit_ids.astype(str)
    pairs = pd.DataFrame(
        {
            "unit_k": ids[params.pairs.k],
            "unit_l": ids[params.pairs.l],
            "covariance": params.pairs.c,
        }
    )
    return units, pairs


def parameters_from_frames(
    magnitude_type: str,
    units: pd.DataFrame,
    pairs: pd.DataFrame,
    *,
    tau_b2: float,
    s0_2: float,
) -> StationParameters:
    """Inverse of :func:`parameters_to_frames`."""
    ids = units["unit_id"].to_numpy(dtype=str)
    index = {u: i for i, u in enumerate(ids)}
    k = np.array([index[u] for u in pairs["unit_k"]], dtype=np.int64)
    l = np.array([index[u] for u in pairs["unit_l"]], dtype=np.int64)

    def _times(col: str) -> np.ndarray[Any, np.dtype[np.datetime64]]:
        s = pd.to_datetime(units[col], utc=True).dt.tz_localize(None)
        return s.to_numpy(dtype="datetime64[us]")

    return StationParameters(
        magnitude_type=magnitude_type,
        unit_ids=ids.astype(object),
        station_ids=units["station_id"].to_numpy(dtype=str).astype(object),
        epoch_start=_times("epoch_start"),
        epoch_end=_times("epoch_end"),
        bias=units["bias"].to_numpy(dtype=float),
        bias_var=units["bias_var"].to_numpy(dtype=float),
        sigma2=units["sigma2"].to_numpy(dtype=float),
        prior_dominated=units["prior_dominated"].to_numpy(dtype=bool),
        pairs=PairCovariance(k, l, pairs["covariance"].to_numpy(dtype=float), ids.shape[0]),
        tau_b2=tau_b2,
        s0_2=s0_2,
    )


def _write_json_atomic(path: Path, payload: Mapping[str, Any]) -> None:
    """Replace ``path`` by the JSON of ``payload`` atomically (the caller holds the lock).

    The temporary name is fixed (``stations.store.atomic``), so a writer killed before its
    rename leaves a file that the next write simply overwrites.
    """
    text = strict_json.dumps(payload, indent=2, sort_keys=True)
    write_bytes_atomic(path, text.encode("utf-8"))


class ModelRegistry:
    """Model versions of one store (see module docstring).

    Parameters
    ----------
    store_root : Path
        The store directory; versions live in ``store_root/models``.
    lock : callable returning a context manager, optional
        The store's write lock (``StationMagnitudeStore.write_lock``); writers hold it while they
        create a version or switch the active one. Without it no locking is done (tests).
    """

    def __init__(
        self, store_root: Path, *, lock: Callable[[], AbstractContextManager[Any]] | None = None
    ) -> None:
        self.root = Path(store_root) / "models"
        self._lock = lock

    # -- helpers ---------------------------------------------------------------------------
    @contextlib.contextmanager
    def _locked(self) -> Iterator[None]:
        if self._lock is None:
            yield
        else:
            with self._lock():
                self.remove_leftovers()
                yield

    def remove_leftovers(self) -> list[Path]:
        """Remove temporary version folders of killed writers; return what was removed.

        Call only while holding the store's write lock (every writer of this class does).
        """
        removed: list[Path] = []
        for folder in self.root.glob("*/versions/.*"):
            if folder.is_dir():
                shutil.rmtree(folder, ignore_errors=True)
                removed.append(folder)
        return removed

    def _type_dir(self, magnitude_type: str) -> Path:
        return self.root / check_magnitude_type(magnitude_type)

    @staticmethod
    def _type_of(version_id: str) -> str:
        match = _VERSION_ID.match(check_version_id(version_id))
        assert match is not None  # checked above
        return match.group("type")

    # -- writing ---------------------------------------------------------------------------
    def save(
        self,
        params: StationParameters,
        meta: Mapping[str, Any],
        tables: Mapping[str, pd.DataFrame] | None = None,
        *,
        now: datetime | None = None,
    ) -> ModelVersion:
        """Store a new immutable version (not adopted) and return it.

        ``meta`` should hold at least window, as-of time, config hash, data fingerprint and
        anchor; the registry adds version id, magnitude type, creation time and code version.
        """
        from fusion import __version__

        created = (now or datetime.now(UTC)).astimezone(UTC)
        units, pairs = parameters_to_frames(params)
        digest = hashlib.sha256()
        digest.update(pd.util.hash_pandas_object(units, index=False).to_numpy().tobytes())
        digest.update(json.dumps(dict(meta), sort_keys=True, default=str).encode())
        version_id = f"{params.magnitude_type}-{created:%Y%m%dT%H%M%SZ}-{digest.hexdigest()[:8]}"
        full_meta = {
            **dict(meta),
            "version": version_id,
            "magnitude_type": params.magnitude_type,
            "created": created.isoformat(),
            "code_version": __version__,
            "tau_b2": params.tau_b2,
            "s0_2": params.s0_2,
            "n_units": params.n_units,
            "n_pairs": params.pairs.n_pairs,
        }
        type_dir = self._type_dir(params.magnitude_type)
        with self._locked():
            (type_dir / "versions").mkdir(parents=True, exist_ok=True)
            final = type_dir / "versions" / version_id
            if final.exists():
                return self.get(version_id)
            tmp = Path(tempfile.mkdtemp(prefix=f".{version_id}.", dir=type_dir / "versions"))
            try:
                units.to_parquet(tmp / "units.parquet", index=False)
                pairs.to_parquet(tmp / "pairs.parquet", index=False)
                if tables:
                    (tmp / "tables").mkdir()
                    for name, frame in tables.items():
                        frame.to_parquet(tmp / "tables" / f"{name}.parquet", index=False)
                with open(tmp / "meta.json", "w", encoding="utf-8") as fh:
                    fh.write(strict_json.dumps(full_meta, indent=2, sort_keys=True))
                sums = {
                    f.relative_to(tmp).as_posix(): sha256_of(f)
                    for f in sorted(tmp.rglob("*"))
                    if f.is_file()
                }
                with open(tmp / _CHECKSUMS, "w", encoding="utf-8") as fh:
                    fh.write(strict_json.dumps(sums, indent=2, sort_keys=True))
                for f in tmp.rglob("*"):
                    if f.is_file():
                        with open(f, "rb") as fh:
                            os.fsync(fh.fileno())
                os.rename(tmp, final)
                fsync_dir(final.parent)
            except BaseException:
                shutil.rmtree(tmp, ignore_errors=True)
                raise
        return ModelVersion(version_id, params.magnitude_type, full_meta, final)

    def adopt(self, version_id: str) -> ModelVersion:
        """Make ``version_id`` the active model of its magnitude type (atomic pointer switch)."""
        version = self.get(version_id)
        with self._locked():
            state = self._read_active(version.magnitude_type)
            history = list(state.get("history", []))
            current = state.get("version")
            if current == version_id:
                return version
            if current:
                history.append(current)
            _write_json_atomic(
                self._type_dir(version.magnitude_type) / _ACTIVE,
                {"version": version_id, "history": history},
            )
        return version

    def rollback(self, magnitude_type: str) -> ModelVersion:
        """Re-activate the version that was active before the current one."""
        with self._locked():
            state = self._read_active(magnitude_type)
            history = list(state.get("history", []))
            if not history:
                raise ModelNotFoundError(
                    f"no earlier {magnitude_type} model to roll back to; "
                    "adopt a version with 'magfuse adopt VERSION'"
                )
            previous = history.pop()
            _write_json_atomic(
                self._type_dir(magnitude_type) / _ACTIVE, {"version": previous, "history": history}
            )
        return self.get(previous)

    # -- reading ---------------------------------------------------------------------------
    def _read_active(self, magnitude_type: str) -> dict[str, Any]:
        path = self._type_dir(magnitude_type) / _ACTIVE
        try:
            with open(path, encoding="utf-8") as fh:
                data: dict[str, Any] = json.load(fh)
        except FileNotFoundError:
            return {}
        except json.JSONDecodeError as exc:
            raise StoreCorruptError(f"{path}: unreadable active-model pointer ({exc})") from None
        return data

    def get(self, version_id: str) -> ModelVersion:
        """The stored version ``version_id``."""
        mtype = self._type_of(version_id)
        path = self._type_dir(mtype) / "versions" / version_id
        meta_path = path / "meta.json"
        try:
            with open(meta_path, encoding="utf-8") as fh:
                meta = json.load(fh)
        except FileNotFoundError:
            raise ModelNotFoundError(
                f"model version {version_id!r} not found; list them with 'magfuse models'"
            ) from None
        return ModelVersion(version_id, mtype, meta, path)

    def active(self, magnitude_type: str) -> ModelVersion:
        """The active version of ``magnitude_type``."""
        version = self._read_active(magnitude_type).get("version")
        if not version:
            raise ModelNotFoundError(
                f"no active {magnitude_type} model; run 'magfuse learn --type {magnitude_type}' "
                "and 'magfuse adopt VERSION'"
            )
        return self.get(str(version))

    def active_id(self, magnitude_type: str) -> str | None:
        """Id of the active version, or None."""
        version = self._read_active(magnitude_type).get("version")
        return str(version) if version else None

    def versions(self, magnitude_type: str | None = None) -> list[ModelVersion]:
        """All stored versions (optionally of one type), oldest first."""
        known = {m.value for m in MagnitudeType}
        types = (
            [check_magnitude_type(magnitude_type)]
            if magnitude_type
            else sorted(p.name for p in self.root.glob("*") if p.is_dir() and p.name in known)
        )
        out: list[ModelVersion] = []
        for mtype in types:
            vdir = self._type_dir(mtype) / "versions"
            for path in sorted(vdir.glob(f"{mtype}-*")):
                if path.is_dir():
                    out.append(self.get(path.name))
        out.sort(key=lambda v: v.created)
        return out

    def load_parameters(self, version: ModelVersion | str) -> StationParameters:
        """The :class:`StationParameters` of a version."""
        v = self.get(version) if isinstance(version, str) else version
        sums = self._checksums(v)
        check_digest(v.path / "units.parquet", sums.get("units.parquet"))
        check_digest(v.path / "pairs.parquet", sums.get("pairs.parquet"))
        try:
            units = pd.read_parquet(v.path / "units.parquet")
            pairs = pd.read_parquet(v.path / "pairs.parquet")
        except (OSError, ValueError) as exc:
            raise StoreCorruptError(f"{v.path}: cannot read model tables ({exc})") from None
        return parameters_from_frames(
            v.magnitude_type,
            units,
            pairs,
            tau_b2=float(v.meta["tau_b2"]),
            s0_2=float(v.meta["s0_2"]),
        )

    def load_table(self, version: ModelVersion | str, name: str) -> pd.DataFrame:
        """One of the learned tables stored with a version (``stations``, ``pairs``, ...)."""
        v = self.get(version) if isinstance(version, str) else version
        path = v.path / "tables" / f"{name}.parquet"
        if not path.exists():
            raise ModelNotFoundError(f"model {v.version_id} has no table {name!r}")
        check_digest(path, self._checksums(v).get(f"tables/{name}.parquet"))
        return pd.read_parquet(path)

    @staticmethod
    def _checksums(v: ModelVersion) -> dict[str, str]:
        """The version's recorded SHA-256 per file; empty for versions written without."""
        path = v.path / _CHECKSUMS
        try:
            with open(path, encoding="utf-8") as fh:
                data = json.load(fh)
        except FileNotFoundError:
            return {}
        except (json.JSONDecodeError, UnicodeDecodeError):
            raise StoreCorruptError(
                f"{path}: damaged (not JSON); restore the version folder from a backup"
            ) from None
        return {str(k): str(val) for k, val in dict(data).items()}

    def verify(self) -> tuple[int, list[Problem]]:
        """Check every file of every stored version against its ``checksums.json``.

        Returns the number of files checked and the problems (paths relative to the store
        root). A version written before checksums existed is checked for readable
        ``meta.json`` only; an unreadable active pointer is a problem too.
        """
        store_root = self.root.parent
        checked = 0
        problems: list[Problem] = []
        known = {m.value for m in MagnitudeType}
        for tdir in sorted(p for p in self.root.glob("*") if p.is_dir() and p.name in known):
            active = tdir / _ACTIVE
            if active.exists():
                checked += 1
                try:
                    json.loads(active.read_text(encoding="utf-8"))
                except (json.JSONDecodeError, UnicodeDecodeError):
                    problems.append(Problem(active.relative_to(store_root).as_posix(), "not JSON"))
            for vdir in sorted((tdir / "versions").glob(f"{tdir.name}-*")):
                if not vdir.is_dir():
                    continue
                rel = vdir.relative_to(store_root).as_posix()
                try:
                    sums = self._checksums(ModelVersion(vdir.name, tdir.name, {}, vdir))
                except StoreCorruptError:
                    problems.append(Problem(f"{rel}/{_CHECKSUMS}", "not JSON"))
                    continue
                items: list[tuple[str, str | None, None]] = [
                    (f"{rel}/{name}", digest, None) for name, digest in sums.items()
                ]
                if not sums:
                    items = [(f"{rel}/meta.json", None, None)]
                checked += len(items)
                problems += verify_files(store_root, items)
        return checked, problems
