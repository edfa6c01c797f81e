"""From a file to the store: read, optionally compute magnitudes from amplitudes, gate, commit.

The path of one file (DEVELOPERS.md, "How data flows")::

    read_records(path)                      stations.readers: parse + validate rows
      -> compute_station_magnitudes(...)    stations.formulas: only with a ComputeOptions
      -> hold_uncomputed(...)               detections with an amplitude but no magnitude
      -> StationMagnitudeStore.ingest(...)  one atomic batch; rejected rows to quarantine

A file whose content (SHA-256, plus the compute options when computing) was ingested before is
skipped whole. Nothing accepted is lost: every input row ends in the store or in the quarantine
with its reason.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable
from dataclasses import asdict, dataclass
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from stations.store.keys import decimals_of
from stations.validation import DEFAULT_MAGNITUDE_RANGE, json_rows, rejected_frame

if TYPE_CHECKING:
    from stations.formulas import ComputeOptions
    from stations.metadata import StationMetadata
    from stations.store import IngestReport, StationMagnitudeStore

__all__ = [
    "IngestOutcome",
    "build_compute_options",
    "decimals_of",
    "hold_uncomputed",
    "ingest_file",
    "options_fingerprint",
    "recompute_window",
    "unchanged_within_precision",
]

#: Reason given to a detection that carries an amplitude but no magnitude when nothing
#: computes it.
UNCOMPUTED_REASON = (
    "detection with an amplitude but no magnitude; ingest with --compute (and --stations "
    "FILE when distances are missing) or give the magnitude"
)


@dataclass(frozen=True, slots=True)
class IngestOutcome:
    """One file's result: the store's report, plus how many magnitudes magfuse computed."""

    report: IngestReport
    computed: int = 0
    distances_filled: int = 0
    out_of_domain: int = 0
    #: Earliest origin time of the rows offered to the store (None if there were none).
    first_origin: datetime | None = None


def hold_uncomputed(
    records: pd.DataFrame, *, source_file: str
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Split off detections that have an amplitude but no magnitude (quarantined with reason).

    Returns
    -------
    kept, rejected : DataFrame
        ``kept`` has the input columns; ``rejected`` the quarantine columns.
    """
    none = rejected_frame(source_file, [], [], [])
    if records.empty:
        return records, none
    missing = records["detected"].to_numpy(bool) & records["magnitude"].isna().to_numpy()
    if not np.any(missing):
        return records, none
    idx = np.flatnonzero(missing)
    rejected = rejected_frame(
        source_file,
        records["source_location"].iloc[idx].astype(str).tolist(),
        [UNCOMPUTED_REASON] * idx.shape[0],
        json_rows(records)(idx),
    )
    return records[~missing], rejected


def build_compute_options(
    *,
    ml_distance_correction: str = "HB87",
    q_table: str = "GR56-Q",
    mb_lg_gamma_per_km: float | None = None,
    mb_bb_period_range_s: tuple[float, float] = (0.2, 30.0),
    ms_bb_period_range_s: tuple[float, float] = (2.0, 60.0),
    allow_out_of_domain: bool = False,
    use_station_elevation: bool = False,
    recompute: bool = False,
) -> ComputeOptions:
    """:class:`~stations.formulas.ComputeOptions` from configuration values.

    ``ml_distance_correction`` and ``q_table`` are a shipped table's name or the path of a CSV
    table (:func:`stations.formulas.read_distance_correction_csv`,
    :meth:`stations.formulas.QTable.read_csv`).

    Raises
    ------
    ConfigError
        If a name is neither a shipped table nor an existing file.
    """
    from stations.errors import ConfigError
    from stations.formulas import (
        DISTANCE_CORRECTIONS,
        Q_TABLES,
        ComputeOptions,
        QTable,
        read_distance_correction_csv,
    )

    if ml_distance_correction in DISTANCE_CORRECTIONS:
        correction = DISTANCE_CORRECTIONS[ml_distance_correction]
    elif Path(ml_distance_correction).is_file():
        correction = read_distance_correction_csv(Path(ml_distance_correction))
    else:
        raise ConfigError(
            f"ML distance correction {ml_distance_correction!r} is neither one of "
            f"{', '.join(DISTANCE_CORRECTIONS)} nor a CSV file; fix [compute] "
            "ml_distance_correction"
        )
    if q_table in Q_TABLES:
        table = Q_TABLES[q_table]
    elif Path(q_table).is_file():
        table = QTable.read_csv(Path(q_table), name=Path(q_table).stem)
    else:
        raise ConfigError(
            f"Q table {q_table!r} is neither one of {', '.join(Q_TABLES)} nor a CSV file; "
            "fix [compute] q_table"
        )
    return ComputeOptions(
        allow_out_of_domain=allow_out_of_domain,
        recompute=recompute,
        ml_correction=correction,
        q_table=table,
        mb_lg_gamma_per_km=mb_lg_gamma_per_km,
        mb_bb_period_range_s=mb_bb_period_range_s,
        ms_bb_period_range_s=ms_bb_period_range_s,
        use_station_elevation=use_station_elevation,
    )


def options_fingerprint(options: ComputeOptions, metadata: StationMetadata | None) -> str:
    """A short hash of the compute options (and whether metadata was given)."""
    payload = {
        k: (v.name if hasattr(v, "name") else v)
        for k, v in asdict(options).items()
        if k not in ("ml_correction", "q_table")
    }
    payload["ml_correction"] = options.ml_correction.name
    payload["q_table"] = options.q_table.name
    payload["metadata"] = metadata is not None
    text = json.dumps(payload, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def ingest_file(
    store: StationMagnitudeStore,
    path: Path,
    *,
    format: str | None = None,
    magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE,
    default_network: str | None = None,
    compute: ComputeOptions | None = None,
    metadata: StationMetadata | None = None,
    on_wait: Callable[[str], None] | None = None,
    allow_near_duplicates: bool = False,
) -> IngestOutcome:
    """Read one file and commit it to ``store`` as one batch.

    Parameters
    ----------
    store : StationMagnitudeStore
    path : Path
    format : str, optional
        Reader name (:func:`stations.readers.supported_formats`); None recognises the file.
    magnitude_range : (float, float)
        Accepted station magnitudes, magnitude units.
    default_network : str, optional
        Network code for stations named without one (IMS1.0, mchedr).
    compute : ComputeOptions, optional
        Compute magnitudes of rows that carry an amplitude but no magnitude
        (:func:`stations.formulas.compute_station_magnitudes`); without it such detections are
        quarantined with :data:`UNCOMPUTED_REASON`.
    metadata : StationMetadata, optional
        Station coordinates to fill missing distances when computing.
    on_wait : callable, optional
        Receives one message if the store lock is busy.
    allow_near_duplicates : bool, default=False
        Accept events that coincide with stored events under other ids
        (:mod:`stations.store.duplicates`).

    Raises
    ------
    MalformedFileError, UnknownFormatError, FileNotFoundError
        From the readers; nothing is stored then.
    NearDuplicateEventError
        If an event coincides with a stored event under another id; nothing is stored.
    StoreBusyError
        If another writer holds the store longer than its lock timeout.
    """
    from stations.readers import DEFAULT_NETWORK, read_records
    from stations.store import IngestReport, file_digest

    digest = file_digest(path)
    if compute is not None:
        digest = f"{digest}|compute:{options_fingerprint(compute, metadata)}"
    earlier = store.batch_with_content(digest)
    if earlier is not None:
        return IngestOutcome(IngestReport(str(path), None, 0, 0, 0, 0, same_content_as=earlier))
    result = read_records(
        path,
        format,
        magnitude_range=magnitude_range,
        default_network=default_network or DEFAULT_NETWORK,
    )
    records = result.records
    rejected = [result.rejected]
    computed = filled = out_of_domain = 0
    if compute is not None and not records.empty:
        from stations.formulas import compute_station_magnitudes

        res = compute_station_magnitudes(records, metadata=metadata, options=compute)
        records = res.records
        rejected.append(res.rejected)
        computed, filled, out_of_domain = (
            res.n_computed,
            res.n_distances_filled,
            res.n_out_of_domain,
        )
    records, held = hold_uncomputed(records, source_file=result.source_file)
    rejected.append(held)
    report = store.ingest(
        records,
        pd.concat([r for r in rejected if not r.empty] or [rejected[0]], ignore_index=True),
        source_file=result.source_file,
        content_hash=digest,
        on_wait=on_wait,
        check_near_duplicates=not allow_near_duplicates,
    )
    first = records["origin_time"].min() if not records.empty else None
    first_origin = None if first is None or pd.isna(first) else first.to_pydatetime()
    return IngestOutcome(report, computed, filled, out_of_domain, first_origin)


def recompute_window(
    store: StationMagnitudeStore,
    *,
    magnitude_type: str,
    options: ComputeOptions,
    metadata: StationMetadata | None = None,
    start: datetime | None = None,
    end: datetime | None = None,
    on_wait: Callable[[str], None] | None = None,
) -> IngestOutcome:
    """Recompute the magnitudes of one type from their stored amplitudes (a new revision).

    Every current row of ``magnitude_type`` in [start, end) that carries an amplitude is run
    through the formula again (``options.recompute`` forced on), e.g. after a change of the
    ML distance correction or the Q table. Rows whose value or ``formula`` changes become the
    next revision of their key; the old values stay retrievable with ``all_revisions``; rows
    that come out the same are duplicates. Rows the formula now rejects are quarantined and
    their stored value is left as it was.
    """
    from dataclasses import replace

    from stations.formulas import compute_station_magnitudes
    from stations.schema import INPUT_COLUMNS

    frame = store.scan(magnitude_type=magnitude_type, start=start, end=end)
    frame = frame[frame["amplitude"].notna()]
    source = (
        f"recompute {magnitude_type} {options.ml_correction.name}/{options.q_table.name} "
        f"{start or '-'}..{end or '-'}"
    )
    if frame.empty:
        from stations.errors import InsufficientDataError

        raise InsufficientDataError(
            f"no stored {magnitude_type} rows with an amplitude in that window; "
            "check --type, --since and --until"
        )
    records = frame.loc[:, list(INPUT_COLUMNS)].reset_index(drop=True)
    res = compute_station_magnitudes(
        records, metadata=metadata, options=replace(options, recompute=True)
    )
    same = unchanged_within_precision(res.records, records)
    changed = res.records[~same]
    counts = (res.n_computed, res.n_distances_filled, res.n_out_of_domain)
    if changed.empty and res.rejected.empty:
        from stations.store import IngestReport

        return IngestOutcome(IngestReport(source, None, 0, int(same.sum()), 0, 0), *counts)
    report = store.ingest(changed, res.rejected, source_file=source, on_wait=on_wait)
    report = replace(report, duplicate=report.duplicate + int(same.sum()))
    return IngestOutcome(report, *counts)


def unchanged_within_precision(new: pd.DataFrame, old: pd.DataFrame) -> np.ndarray:
    """Rows of ``new`` whose stored reading (same key in ``old``) it only restates.

    A recomputed value equals the stored one when they differ by at most half a unit in the
    last decimal place of the stored value (a magnitude stored as ``1.214`` takes any value
    within 0.0005: the source rounded it to three places, so the recomputation cannot say
    more). Text and flag columns must be equal, except that a ``formula`` the stored row did
    not name counts as equal (the value stayed, only its provenance would be added).

    Parameters
    ----------
    new, old : pandas.DataFrame
        Columns :data:`~stations.schema.INPUT_COLUMNS`; ``old`` holds at most one row per
        :data:`~stations.schema.RECORD_KEY`.

    Returns
    -------
    ndarray of bool, shape (len(new),)
        True where the row changes nothing beyond the stored precision.
    """
    from stations.schema import RECORD_KEY, VALUE_COLUMNS

    if new.empty or old.empty:
        return np.zeros(len(new), dtype=bool)
    key = list(RECORD_KEY)
    left = new[key].astype(object).where(new[key].notna(), "\x00").reset_index(drop=True)
    right = old[key].astype(object).where(old[key].notna(), "\x00").reset_index(drop=True)
    right["__old"] = np.arange(len(old))
    at = left.merge(right, on=key, how="left")["__old"].to_numpy()
    found = ~pd.isna(at)
    idx = np.where(found, at, 0).astype(np.int64)
    same = found.copy()
    for col in VALUE_COLUMNS:  # loop over columns, not rows
        a = new[col].to_numpy()
        b = old[col].to_numpy()[idx]
        if pd.api.types.is_float_dtype(new[col]) and pd.api.types.is_float_dtype(old[col]):
            a_f, b_f = a.astype(float), b.astype(float)
            tol = 0.5 * 10.0 ** -decimals_of(b_f).astype(float) + 1e-12
            both_nan = np.isnan(a_f) & np.isnan(b_f)
            same &= both_nan | (np.abs(a_f - b_f) <= tol)
        else:
            a_na, b_na = pd.isna(a), pd.isna(b)
            eq = (a_na & b_na) | (~a_na & ~b_na & (a.astype(object) == b.astype(object)))
            if col == "formula":
                eq |= b_na
            same &= eq
    return same
