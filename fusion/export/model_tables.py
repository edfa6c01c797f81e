"""A model version's learned tables (stations, pairs, epochs) as CSV or Parquet.

The tables are those stored with a model version (:meth:`ModelRegistry.load_table
<fusion.versions.model_registry.ModelRegistry.load_table>`): ``stations``
(:data:`fusion.model.station_model.STATION_TABLE_COLUMNS`), ``pairs``
(:data:`fusion.model.pair_tests.TABLE_COLUMNS`) and ``epochs``
(:data:`fusion.model.epochs.STEP_COLUMNS`).
Their known columns have a declared type, unit and description below
(:data:`MODEL_TABLE_COLUMNS`); a column the learner adds later is exported with the type of
its values (bool, integer, float, time or text; anything else is an error naming it) and
described as undocumented until it is added here. Columns keep the table's order.

Units: magnitude units for biases, their standard errors and error SDs; magnitude units squared
for covariances; "1" for correlations, probabilities, scores and counts; UTC for times. The
README sidecar lists every column with its unit; Parquet files carry them in field metadata
and the model version and advisory in file metadata.
"""

from __future__ import annotations

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

__all__ = ["MODEL_TABLE_COLUMNS", "export_model_table", "model_table"]

_MU: Final = "magnitude units"
_UTC: Final = pa.timestamp("us", tz="UTC")
_F: Final = pa.float64()
_I: Final = pa.int64()
_S: Final = pa.string()
_B: Final = pa.bool_()


def _specs(*rows: tuple[str, pa.DataType, str, str]) -> dict[str, ColumnSpec]:
    return {name: ColumnSpec(name, name, typ, unit, doc) for name, typ, unit, doc in rows}


#: Declared columns of each model table, by table name (module docstring).
MODEL_TABLE_COLUMNS: Final[dict[str, dict[str, ColumnSpec]]] = {
    "stations": _specs(
        ("unit_id", _S, "-", "station unit: NET.STA.LOC, plus @YYYY-MM-DD for later epochs"),
        ("station_id", _S, "-", "FDSN NET.STA.LOC"),
        ("epoch_start", _UTC, "UTC", "start of the unit's epoch; empty: open"),
        ("epoch_end", _UTC, "UTC", "end of the unit's epoch; empty: open"),
        ("bias", _F, _MU, "station bias relative to the anchor (correction = -bias)"),
        ("bias_se", _F, _MU, "standard error of bias"),
        ("sigma", _F, _MU, "error SD of the station's magnitudes (moderated)"),
        ("dof", _F, "1", "effective degrees of freedom of sigma"),
        ("n_events", _I, "1", "readings used by the fit"),
        ("weight_sum", _F, "1", "sum of the forgetting weights of those readings"),
        ("outlier_rate", _F, "1", "fraction of readings with a low robust weight"),
        ("prior_dominated", _B, "-", "the prior carries more information than the data"),
        ("uncalibrated", _B, "-", "no anchor reaches the unit, or no data"),
        ("partner", _S, "-", "unit id of the flagged correlated partner; empty: none"),
    ),
    "pairs": _specs(
        ("station_k", _S, "-", "first station (NET.STA.LOC)"),
        ("station_l", _S, "-", "second station"),
        ("k", _I, "1", "code of station_k in the station table"),
        ("l", _I, "1", "code of station_l"),
        ("n_shared", _I, "1", "events both stations recorded"),
        ("n_effective", _F, "1", "effective number of shared events, (sum w)^2 / sum w^2"),
        ("c_hat", _F, "magnitude units^2", "estimated error covariance"),
        ("rho_hat", _F, "1", "estimated error correlation"),
        ("rho_ci_low", _F, "1", "lower end of the 95 % Fisher-z interval of rho"),
        ("rho_ci_high", _F, "1", "upper end of that interval"),
        ("rho_null", _F, "1", "null correlation of the leave-two-out residuals"),
        ("r_raw", _F, "1", "observed uncentred correlation of those residuals"),
        ("statistic", _F, "1", "test statistic T_self"),
        ("statistic_model", _F, "1", "test statistic T_model"),
        ("p_value", _F, "1", "p-value of the pair test"),
        ("q_value", _F, "1", "false-discovery-rate adjusted p-value"),
        ("rejected", _B, "-", "independence rejected at the configured level"),
        ("flagged", _B, "-", "used as a correlated pair in the network magnitude"),
        ("status", _S, "-", "flagged, paired_elsewhere, negative or not_significant"),
    ),
    "epochs": _specs(
        ("station_id", _S, "-", "FDSN NET.STA.LOC"),
        ("station", _I, "1", "code of the station in the station table"),
        ("change_time", _UTC, "UTC", "origin time of the first event of the new epoch"),
        ("alarm_time", _UTC, "UTC", "origin time of the event that raised the alarm"),
        ("direction", _I, "1", "+1 bias up, -1 bias down"),
        ("n_before", _I, "1", "readings of the epoch before"),
        ("n_after", _I, "1", "readings of the epoch after"),
        ("peak", _F, "1", "largest CUSUM value of the alarm's excursion"),
        ("shift_z", _F, "1", "mean z after minus mean z before"),
    ),
}


def _inferred_spec(name: str, col: pd.Series) -> ColumnSpec:
    """Spec of an undocumented column from the kind of its values."""
    doc = "(undocumented column)"
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


def model_table(frame: pd.DataFrame, name: str) -> pa.Table:
    """The export table of a model table ``name`` (``stations``, ``pairs``, ``epochs``, ...).

    Known columns are cast to their declared type (:data:`MODEL_TABLE_COLUMNS`); naive times
    are taken as UTC; NaN becomes a missing value.

    Raises
    ------
    SchemaError
        A column cannot take its declared type, or an undocumented column holds values with
        no export type.
    """
    frame = frame.rename(columns=str)
    known = MODEL_TABLE_COLUMNS.get(name, {})
    specs = [known.get(c) or _inferred_spec(c, frame[c]) for c in frame.columns]
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
    table = model_table(frame, name)
    known = MODEL_TABLE_COLUMNS.get(name, {})
    undocumented = [c for c in table.column_names if c not in known]
    notes = (
        [f"Columns without a description in this magfuse version: {', '.join(undocumented)}."]
        if undocumented
        else []
    )
    created = (now or datetime.now(UTC)).astimezone(UTC)
    return export_table(
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
        notes=notes,
    )
