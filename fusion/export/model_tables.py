"""A model version's learned tables (stations, pairs, epochs) as CSV or Parquet.

The tables are those stored with a model version (:meth:`ModelRegistry.load_table
<fusion.versions.model_registry.ModelRegistry.load_table>`): ``stations``
(:data:`fusion.model.station_model.STATION_TABLE_COLUMNS`), ``pairs``
(:data:`fusion.model.pair_tests.TABLE_COLUMNS`) and ``epochs``
(:data:`fusion.model.epochs.STEP_COLUMNS`).
Their known columns have a declared type, unit, description and export name below
(:data:`MODEL_TABLE_COLUMNS`: the exports use plain names, e.g. ``error_correlation`` for the
learner's ``rho_hat``); the learner's integer row codes are left out
(:data:`INTERNAL_COLUMNS`), and the epochs export names both units of a step
(``unit_before``, ``unit_after``). A column the learner adds later is exported with the type
of its values (bool, integer, float, time or text; anything else is an error naming it) and
described as undocumented until it is added here. Columns keep the table's order.

Units: magnitude units for biases, their standard errors and error SDs; magnitude units squared
for covariances; "1" for correlations, probabilities, scores and counts; UTC for times. The
README sidecar lists every column with its unit; Parquet files carry them in field metadata
and the model version and advisory in file metadata.
"""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Final

import pandas as pd
import pyarrow as pa

from fusion.export.formats import ColumnSpec, ExportFormat, ExportReport, check_format
from fusion.export.tabular import export_table
from fusion.versions.fused_store import frame_to_table
from stations.errors import SchemaError

if TYPE_CHECKING:
    from fusion.versions.model_registry import ModelRegistry, ModelVersion

__all__ = ["INTERNAL_COLUMNS", "MODEL_TABLE_COLUMNS", "export_model_table", "model_table"]

_UNDOCUMENTED: Final = "(undocumented column)"

#: Paragraphs of each table's README sidecar.
_TABLE_NOTES: Final[dict[str, list[str]]] = {
    "stations": [
        "One row per station unit. A unit is a station epoch: a station (NET.STA.LOC) over a "
        "span of time in which its bias stayed the same. A station whose bias stepped has one "
        "unit per epoch; unit_id is NET.STA.LOC for the first and NET.STA.LOC@YYYY-MM-DD for "
        "an epoch that began on that date."
    ],
    "pairs": [
        "One row per tested pair of station units (unit_id as in the stations table). A pair "
        "is tested for correlated errors with a leave-two-out statistic; flagged pairs get "
        "their error covariance in the network magnitude (docs/pairs.md)."
    ],
    "epochs": [
        "One row per bias step found (CUSUM drift alarm). A unit is a station epoch: a "
        "station over a span of time in which its bias stayed the same. The station's "
        "readings before change_time belong to unit_before, those from change_time on to "
        "unit_after (unit_id as in the stations table; docs/epochs.md)."
    ],
}

_MU: Final = "magnitude units"
_UTC: Final = pa.timestamp("us", tz="UTC")
_F: Final = pa.float64()
_I: Final = pa.int64()
_S: Final = pa.string()
_B: Final = pa.bool_()


def _specs(*rows: tuple[str, str, pa.DataType, str, str]) -> dict[str, ColumnSpec]:
    """Specs keyed by the learner's column; each is ``(export name, learner column, ...)``."""
    return {src: ColumnSpec(name, src, typ, unit, doc) for name, src, typ, unit, doc in rows}


_UNIT: Final = (
    "station unit (a station epoch): NET.STA.LOC for the first epoch, NET.STA.LOC@YYYY-MM-DD "
    "for an epoch that began on that date after a bias step"
)

#: Declared columns of each model table, by table name and learner column (module docstring).
#: A spec's ``name`` is the column in the exported file, its ``source`` the learner's column.
MODEL_TABLE_COLUMNS: Final[dict[str, dict[str, ColumnSpec]]] = {
    "stations": _specs(
        ("unit_id", "unit_id", _S, "-", _UNIT),
        ("station_id", "station_id", _S, "-", "FDSN NET.STA.LOC"),
        ("epoch_start", "epoch_start", _UTC, "UTC", "start of the unit's epoch; empty: open"),
        ("epoch_end", "epoch_end", _UTC, "UTC", "end of the unit's epoch; empty: open"),
        ("bias", "bias", _F, _MU, "station bias relative to the anchor (correction = -bias)"),
        ("bias_se", "bias_se", _F, _MU, "standard error of bias"),
        ("sigma", "sigma", _F, _MU, "error SD of the station's magnitudes (moderated)"),
        ("dof", "dof", _F, "1", "effective degrees of freedom of sigma"),
        ("n_events", "n_events", _I, "1", "readings used by the fit"),
        ("weight_sum", "weight_sum", _F, "1", "sum of the forgetting weights of those readings"),
        ("outlier_rate", "outlier_rate", _F, "1", "fraction of readings with a low robust weight"),
        (
            "prior_dominated",
            "prior_dominated",
            _B,
            "-",
            "the prior carries more information than the data",
        ),
        ("uncalibrated", "uncalibrated", _B, "-", "no anchor reaches the unit, or no data"),
        ("partner", "partner", _S, "-", "unit_id of the flagged correlated partner; empty: none"),
    ),
    "pairs": _specs(
        ("unit_1", "station_k", _S, "-", "first unit of the pair (unit_id of the station table)"),
        ("unit_2", "station_l", _S, "-", "second unit of the pair"),
        ("n_shared", "n_shared", _I, "1", "events both units recorded"),
        (
            "n_effective",
            "n_effective",
            _F,
            "1",
            "effective number of shared events, (sum w)^2 / sum w^2",
        ),
        ("error_covariance", "c_hat", _F, "magnitude units^2", "estimated error covariance"),
        ("error_correlation", "rho_hat", _F, "1", "estimated error correlation"),
        (
            "correlation_ci_low",
            "rho_ci_low",
            _F,
            "1",
            "lower end of the 95 % Fisher-z interval of error_correlation",
        ),
        ("correlation_ci_high", "rho_ci_high", _F, "1", "upper end of that interval"),
        (
            "null_correlation",
            "rho_null",
            _F,
            "1",
            "correlation the leave-two-out residuals have when the errors are independent",
        ),
        (
            "residual_correlation",
            "r_raw",
            _F,
            "1",
            "observed uncentred correlation of the leave-two-out residuals",
        ),
        (
            "statistic",
            "statistic",
            _F,
            "1",
            "test statistic of the pair, scaled by the spread of its own products (about "
            "N(0, 1) when the errors are independent; docs/pairs.md)",
        ),
        (
            "statistic_model",
            "statistic_model",
            _F,
            "1",
            "the same sum scaled by the spread the station model predicts (reported only)",
        ),
        ("p_value", "p_value", _F, "1", "p-value of the pair test"),
        ("q_value", "q_value", _F, "1", "false-discovery-rate adjusted p-value"),
        ("rejected", "rejected", _B, "-", "independence rejected at the configured level"),
        ("flagged", "flagged", _B, "-", "used as a correlated pair in the network magnitude"),
        (
            "status",
            "status",
            _S,
            "-",
            "flagged; paired-elsewhere (a unit already has a flagged partner); negative "
            "(negative correlation, not used); not-significant",
        ),
    ),
    "epochs": _specs(
        ("station_id", "station_id", _S, "-", "FDSN NET.STA.LOC"),
        (
            "unit_before",
            "unit_id",
            _S,
            "-",
            "unit_id of the epoch before the change (whose readings raised the alarm)",
        ),
        (
            "change_time",
            "change_time",
            _UTC,
            "UTC",
            "origin time of the first event of the new epoch",
        ),
        ("alarm_time", "alarm_time", _UTC, "UTC", "origin time of the event that raised the alarm"),
        ("direction", "direction", _I, "1", "+1 bias up, -1 bias down"),
        ("n_before", "n_before", _I, "1", "readings of the epoch before"),
        ("n_after", "n_after", _I, "1", "readings of the epoch after"),
        ("peak", "peak", _F, "1", "largest CUSUM value of the alarm's excursion"),
        (
            "shift_z",
            "shift_z",
            _F,
            "1",
            "mean standardised residual after the change minus the mean before",
        ),
        (
            "change_time_low",
            "change_time_low",
            _UTC,
            "UTC",
            "interval of the change time: last reading possibly before the change",
        ),
        (
            "change_time_high",
            "change_time_high",
            _UTC,
            "UTC",
            "interval of the change time: first reading surely after the change",
        ),
        (
            "evidence",
            "evidence",
            _F,
            "1",
            "likelihood-ratio statistic of the split, deflated for dependent readings",
        ),
        (
            "threshold",
            "threshold",
            _F,
            "1",
            "evidence required: penalty times log(readings of the station)",
        ),
        (
            "inflation",
            "inflation",
            _F,
            "1",
            "variance inflation for dependent readings (1 = independent)",
        ),
        ("bias_before", "bias_before", _F, "magnitude", "fitted bias of the epoch before"),
        ("bias_after", "bias_after", _F, "magnitude", "fitted bias of the epoch after"),
        ("step", "step", _F, "magnitude", "bias after minus bias before (fitted epochs)"),
        ("step_se", "step_se", _F, "magnitude", "standard error of the step"),
    ),
}

#: Integer codes of the learner's tables (row numbers of its station table); the unit and
#: station codes beside them say the same, so the exports leave them out.
INTERNAL_COLUMNS: Final[dict[str, frozenset[str]]] = {
    "pairs": frozenset({"k", "l"}),
    "epochs": frozenset({"station"}),
}

#: Columns an export adds: ``epochs.unit_after`` (see :func:`_unit_after`).
_UNIT_AFTER: Final = ColumnSpec(
    "unit_after",
    "unit_after",
    _S,
    "-",
    "unit_id of the epoch that begins at change_time (station table); empty: the model has "
    "no such epoch",
)


def _unit_after(steps: pd.DataFrame, stations: pd.DataFrame | None) -> pd.Series:
    """The unit of the station table whose epoch starts at each step's change time."""
    out = pd.Series(pd.NA, index=steps.index, dtype=object)
    if (
        stations is None
        or steps.empty
        or not {"unit_id", "station_id", "epoch_start"} <= set(stations.columns)
    ):
        return out
    starts = stations.dropna(subset=["epoch_start"])
    key = pd.MultiIndex.from_arrays(
        [
            starts["station_id"].astype(str),
            pd.to_datetime(starts["epoch_start"], utc=True).dt.floor("s"),
        ]
    )
    lookup = pd.Series(starts["unit_id"].astype(str).to_numpy(), index=key)
    lookup = lookup[~lookup.index.duplicated()]
    want = pd.MultiIndex.from_arrays(
        [
            steps["station_id"].astype(str),
            pd.to_datetime(steps["change_time"], utc=True).dt.floor("s"),
        ]
    )
    got = lookup.reindex(want).to_numpy(dtype=object)
    return pd.Series(got, index=steps.index, dtype=object).where(pd.notna(got), pd.NA)


def _inferred_spec(name: str, col: pd.Series) -> ColumnSpec:
    """Spec of an undocumented column from the kind of its values."""
    doc = _UNDOCUMENTED
    kind = col.dtype.kind
    if kind == "b":
        return ColumnSpec(name, name, _B, "-", doc)
    if kind in "iu":
        return ColumnSpec(name, name, _I, "1", doc)
    if kind == "f":
        return ColumnSpec(name, name, _F, "-", doc)
    if kind == "M":
        return ColumnSpec(name, name, _UTC, "UTC", doc)
    if pd.api.types.infer_dtype(col, skipna=True) in ("string", "empty"):
        return ColumnSpec(name, name, _S, "-", doc)
    raise SchemaError(
        f"model table: column {name!r} holds {col.dtype} values that have no export type; "
        "export bool, integer, float, time or text columns"
    )


def model_table(
    frame: pd.DataFrame, name: str, *, stations: pd.DataFrame | None = None
) -> pa.Table:
    """The export table of a model table ``name`` (``stations``, ``pairs``, ``epochs``, ...).

    Known columns are cast to their declared type and take their export name
    (:data:`MODEL_TABLE_COLUMNS`); internal integer codes are left out
    (:data:`INTERNAL_COLUMNS`); the epochs table gains ``unit_after`` from ``stations`` (the
    same version's station table). Naive times are taken as UTC; NaN becomes a missing value.

    Raises
    ------
    SchemaError
        A column cannot take its declared type, or an undocumented column holds values with
        no export type.
    """
    frame = frame.rename(columns=str)
    frame = frame.drop(columns=[c for c in INTERNAL_COLUMNS.get(name, ()) if c in frame.columns])
    known = dict(MODEL_TABLE_COLUMNS.get(name, {}))
    if name == "epochs":
        known["unit_after"] = _UNIT_AFTER
        frame = frame.assign(unit_after=_unit_after(frame, stations))
        first = [c for c in ("station_id", "unit_id", "unit_after") if c in frame.columns]
        frame = frame[[*first, *(c for c in frame.columns if c not in first)]]
    specs = [known.get(c) or _inferred_spec(c, frame[c]) for c in frame.columns]
    if name == "pairs" and "status" in frame.columns:
        # one style for every name magfuse writes: hyphens (fusion.flags)
        frame = frame.assign(status=frame["status"].str.replace("_", "-", regex=False))
    frame = frame.rename(columns={s.source: s.name for s in specs})
    schema = pa.schema([s.field() for s in specs])
    return frame_to_table(frame, schema, where=f"model table {name!r}")


def export_model_table(
    registry: ModelRegistry,
    version: ModelVersion | str,
    name: str,
    path: Path,
    *,
    format: str = "csv",
    now: datetime | None = None,
) -> ExportReport:
    """Export one learned table of a model version (``magfuse export stations|pairs``).

    Parameters
    ----------
    registry : ModelRegistry
    version : ModelVersion or str
        The model version (e.g. ``registry.active("ML")``).
    name : str
        Table name: ``stations``, ``pairs``, ``epochs`` or another stored table.
    path : Path
        The data file; the sidecar is ``<path>.README.txt``.
    format : {'csv', 'parquet'}, default='csv'
    now : datetime, optional
        Export time.

    Returns
    -------
    ExportReport

    Raises
    ------
    ModelNotFoundError
        The version or its table does not exist.
    UnknownFormatError
        ``format`` is not csv or parquet.
    """
    fmt = check_format(format, (ExportFormat.csv, ExportFormat.parquet), what=f"table {name!r}")
    v = registry.get(version) if isinstance(version, str) else version
    frame = registry.load_table(v, name)
    stations = registry.load_table(v, "stations") if name == "epochs" else None
    table = model_table(frame, name, stations=stations)
    undocumented = [
        f.name for f in table.schema if (f.metadata or {}).get(b"doc") == _UNDOCUMENTED.encode()
    ]
    notes = (
        [f"Columns without a description in this magfuse version: {', '.join(undocumented)}."]
        if undocumented
        else []
    )

    created = (now or datetime.now(UTC)).astimezone(UTC)
    report = export_table(
        table,
        path,
        fmt,
        kind=name,
        title=f"{name} table of model {v.version_id}",
        model_versions=(v.version_id,),
        provenance=[
            ("Magnitude type", v.magnitude_type),
            ("Model created", v.created or "-"),
        ],
        now=created,
        notes=[*_TABLE_NOTES.get(name, []), *notes],
    )
    # the command line prints the report's notes: only what needs attention, not the README
    return dataclasses.replace(report, notes=tuple(notes))
