"""What the station report reads: six plain tables and the model's metadata.

The report is a pure function of :class:`ReportInputs`: it never opens the store or refits a
model, so it can be tested alone and fed from any source (a stored model version, a fresh fit, a
simulation). :func:`report_inputs_from_parameters` builds the inputs from the objects the rest of
magfuse produces (:class:`~fusion.model.parameters.StationParameters` and
:class:`~fusion.network.network_magnitude.FusedMagnitudes`).

Columns (magnitudes in magnitude units, times UTC; *optional* columns may be absent)
------------------------------------------------------------------------------------

``stations``, one row per station unit (a station, or one epoch of it):

================ ======== ==========================================================================
column           required meaning
================ ======== ==========================================================================
unit_id          yes      model unit (``NET.STA.LOC`` or ``NET.STA.LOC@YYYY-MM-DD``), unique
station_id       yes      ``NET.STA.LOC``
bias             yes      b̂_i, relative to the anchor (docs/model.md §3)
bias_se          yes      sqrt(Var b̂_i), >= 0
sigma            yes      moderated error SD σ̃_i, > 0 (docs/estimator.md §5)
epoch_start/end  no       bounds of the unit; NaT (or absent) is open
dof              no       degrees of freedom d_i of σ̃_i (docs/estimator.md §5.1): the σ interval
n_events         no       readings the fit used
weight_sum       no       Σ_j γ_j over those readings (time-weighted count)
outlier_rate     no       fraction of the fit's readings with robust weight below 0.3
prior_dominated  no       d_i < d0 (docs/estimator.md §5.3)
uncalibrated     no       unit in a component without anchor (docs/model.md §3)
partner          no       unit or station id of a flagged correlated partner, else empty
================ ======== ==========================================================================

``pairs`` (tested pairs, :attr:`fusion.model.pair_tests.PairDetection.table`): ``station_k``,
``station_l`` (station or unit ids), ``n_shared``, ``rho_hat``, ``rho_ci_low``, ``rho_ci_high``,
``flagged``; optional ``c_hat``, ``statistic``, ``p_value``, ``q_value``.

``epochs`` (drift alarms, :attr:`fusion.model.epochs.BiasStepResult.table`): ``station_id``,
``change_time``, ``alarm_time``, ``direction`` (+1 up, −1 down); optional ``n_before``,
``n_after``, ``peak``.

``events`` (:attr:`fusion.network.network_magnitude.FusedMagnitudes.events`): ``event_id`` (unique),
``origin_time``, ``magnitude``, ``se``, ``n_stations``, ``plain_mean``; optional
``magnitude_type``, ``ci_low``, ``ci_high``, ``confidence_level``, ``n_eff``, ``median``,
``minus_plain_mean``, ``birge_ratio``, ``flags``, ``max_influence_station``.

``contributions`` (:attr:`fusion.network.network_magnitude.FusedMagnitudes.contributions`):
``event_id``, ``station_id``, ``unit_id`` (empty for a station the model does not know),
``corrected_magnitude``, ``weight``, ``residual``; optional ``magnitude``, ``correction``,
``detected``, ``robust_weight``, ``influence``, ``z``, ``flags``, ``threshold``,
``distance_km`` (epicentral distance, km).

``coordinates`` (optional): ``station_id``, ``latitude``, ``longitude`` (WGS84 degrees).

``model_meta`` keys used (all optional): ``version``, ``magnitude_type``, ``window_start``,
``window_end``, ``as_of``, ``created``, ``anchor`` (a mapping with ``kind``, ``value``, ``se``, or
text).

Every check raises :class:`~stations.errors.SchemaError` (missing column, wrong type) or
:class:`~stations.errors.DomainError` (bad value) with one line naming the table, the row and
the fix.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from stations.errors import DomainError, SchemaError

if TYPE_CHECKING:
    from fusion.model.parameters import StationParameters
    from fusion.network.network_magnitude import FusedMagnitudes

__all__ = [
    "CONTRIBUTION_COLUMNS",
    "EPOCH_COLUMNS",
    "EVENT_COLUMNS",
    "PAIR_COLUMNS",
    "STATION_COLUMNS",
    "ReportInputs",
    "as_bool",
    "codes_in",
    "report_inputs_from_parameters",
]

#: Required columns per table (see the module docstring for the optional ones).
STATION_COLUMNS: Final = ("unit_id", "station_id", "bias", "bias_se", "sigma")
PAIR_COLUMNS: Final = (
    "station_k",
    "station_l",
    "n_shared",
    "rho_hat",
    "rho_ci_low",
    "rho_ci_high",
    "flagged",
)
EPOCH_COLUMNS: Final = ("station_id", "change_time", "alarm_time", "direction")
EVENT_COLUMNS: Final = ("event_id", "origin_time", "magnitude", "se", "n_stations", "plain_mean")
CONTRIBUTION_COLUMNS: Final = (
    "event_id",
    "station_id",
    "unit_id",
    "corrected_magnitude",
    "weight",
    "residual",
)
COORDINATE_COLUMNS: Final = ("station_id", "latitude", "longitude")


def _empty(columns: tuple[str, ...]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})


@dataclass(frozen=True, slots=True, eq=False)
class ReportInputs:
    """Everything the station report shows (columns: module docstring).

    Attributes
    ----------
    model_meta : Mapping
        Model version, magnitude type, window, as-of time, anchor, creation time.
    stations : pandas.DataFrame
        One row per station unit.
    pairs : pandas.DataFrame
        Tested station pairs (may be empty).
    epochs : pandas.DataFrame
        Drift alarms, one row per detected bias step (may be empty).
    events : pandas.DataFrame
        Fused events of the report window.
    contributions : pandas.DataFrame
        One row per (event, station) reading of those events.
    coordinates : pandas.DataFrame or None
        Station coordinates; None draws no maps.
    """

    model_meta: Mapping[str, Any]
    stations: pd.DataFrame
    pairs: pd.DataFrame = field(default_factory=lambda: _empty(PAIR_COLUMNS))
    epochs: pd.DataFrame = field(default_factory=lambda: _empty(EPOCH_COLUMNS))
    events: pd.DataFrame = field(default_factory=lambda: _empty(EVENT_COLUMNS))
    contributions: pd.DataFrame = field(default_factory=lambda: _empty(CONTRIBUTION_COLUMNS))
    coordinates: pd.DataFrame | None = None

    @property
    def magnitude_type(self) -> str:
        """Magnitude type from ``model_meta`` (or the events table), else ``""``."""
        mt = self.model_meta.get("magnitude_type")
        if mt:
            return str(mt)
        if "magnitude_type" in self.events.columns and len(self.events):
            return str(self.events["magnitude_type"].iloc[0])
        return ""

    def validated(self) -> ReportInputs:
        """Check every table (module docstring) and return ``self``.

        Raises
        ------
        SchemaError
            A required column is missing or not of the right kind.
        DomainError
            A value is out of range (σ <= 0, negative SE, duplicate unit or event id, ...).
        """
        _require(self.stations, STATION_COLUMNS, "stations", "the model's station-unit table")
        _require(self.events, EVENT_COLUMNS, "events", "FusedMagnitudes.events")
        _require(
            self.contributions,
            CONTRIBUTION_COLUMNS,
            "contributions",
            "FusedMagnitudes.contributions",
        )
        if len(self.pairs):
            _require(self.pairs, PAIR_COLUMNS, "pairs", "PairDetection.table")
        if len(self.epochs):
            _require(self.epochs, EPOCH_COLUMNS, "epochs", "BiasStepResult.table")
        if self.coordinates is not None:
            _require(self.coordinates, COORDINATE_COLUMNS, "coordinates", "station metadata")
        st = self.stations
        for name in ("bias", "bias_se", "sigma"):
            _numeric(st, name, "stations")
        _check_rows(st, ~np.isfinite(_f(st["bias"])), "stations", "bias is not finite", "unit_id")
        _check_rows(
            st,
            ~(_f(st["bias_se"]) >= 0.0),
            "stations",
            "bias_se must be >= 0 and finite",
            "unit_id",
        )
        _check_rows(
            st,
            ~((_f(st["sigma"]) > 0.0) & np.isfinite(_f(st["sigma"]))),
            "stations",
            "sigma must be > 0 and finite",
            "unit_id",
        )
        dup = st["unit_id"].astype(str).duplicated().to_numpy()
        _check_rows(
            st, dup, "stations", "unit_id appears twice; unit ids must be unique", "unit_id"
        )
        ev = self.events
        for name in ("magnitude", "se", "plain_mean"):
            _numeric(ev, name, "events")
        _numeric(ev, "n_stations", "events")
        _times(ev, "origin_time", "events")
        dup = ev["event_id"].astype(str).duplicated().to_numpy()
        _check_rows(
            ev, dup, "events", "event_id appears twice; event ids must be unique", "event_id"
        )
        se = _f(ev["se"])
        _check_rows(
            ev, se < 0.0, "events", "se is negative; pass the 1-sigma standard error", "event_id"
        )
        co = self.contributions
        for name in ("corrected_magnitude", "weight", "residual"):
            _numeric(co, name, "contributions")
        for name in ("robust_weight", "distance_km", "z", "magnitude"):
            if name in co.columns:
                _numeric(co, name, "contributions")
        if "distance_km" in co.columns:
            d = _f(co["distance_km"])
            _check_rows(
                co,
                d < 0.0,
                "contributions",
                "distance_km is negative; pass epicentral distances in km",
                "station_id",
            )
        if len(self.epochs):
            _times(self.epochs, "change_time", "epochs")
            _times(self.epochs, "alarm_time", "epochs")
        for name in ("prior_dominated", "uncalibrated"):
            if name in st.columns:
                as_bool(st[name], "stations", name)
        if len(self.pairs):
            for name in ("rho_hat", "rho_ci_low", "rho_ci_high", "n_shared"):
                _numeric(self.pairs, name, "pairs")
            as_bool(self.pairs["flagged"], "pairs", "flagged")
        if self.coordinates is not None:
            c = self.coordinates
            _numeric(c, "latitude", "coordinates")
            _numeric(c, "longitude", "coordinates")
            lat = _f(c["latitude"])
            _check_rows(
                c,
                np.abs(lat) > 90.0,
                "coordinates",
                "latitude outside [-90, 90] degrees; swap latitude and longitude?",
                "station_id",
            )
        return self


# -- checks ------------------------------------------------------------------------------------


def _f(values: Any) -> NDArray[np.float64]:
    return np.asarray(pd.to_numeric(values, errors="coerce"), dtype=np.float64)


def _require(frame: pd.DataFrame, columns: tuple[str, ...], table: str, source: str) -> None:
    if not isinstance(frame, pd.DataFrame):
        raise SchemaError(
            f"ReportInputs.{table}: expected a pandas DataFrame, got {type(frame).__name__}; "
            f"pass {source}"
        )
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise SchemaError(
            f"ReportInputs.{table}: column {missing[0]!r} is missing (required: "
            f"{', '.join(columns)}); pass {source}"
        )


def _numeric(frame: pd.DataFrame, column: str, table: str) -> None:
    """Numbers, booleans, or objects that all convert to numbers (tables assembled with
    ``pd.concat`` of an empty frame come back as object columns)."""
    col = frame[column]
    if not len(col) or pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
        return
    converted = pd.to_numeric(col, errors="coerce")
    bad = (converted.isna() & col.notna()).to_numpy()
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise SchemaError(
            f"ReportInputs.{table}: column {column!r}, row {i}: {col.iloc[i]!r} is not a "
            "number; convert the column with pandas.to_numeric"
        )


def _times(frame: pd.DataFrame, column: str, table: str) -> None:
    """Datetimes, or objects that all parse as times (never bare numbers)."""
    col = frame[column]
    if not len(col) or pd.api.types.is_datetime64_any_dtype(col):
        return
    hint = "convert it with pandas.to_datetime(..., utc=True)"
    if pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
        raise SchemaError(
            f"ReportInputs.{table}: column {column!r} holds numbers ({col.dtype}), expected "
            f"UTC times; {hint}"
        )
    converted = pd.to_datetime(col, utc=True, errors="coerce", format="mixed")
    bad = (converted.isna() & col.notna()).to_numpy()
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise SchemaError(
            f"ReportInputs.{table}: column {column!r}, row {i}: {col.iloc[i]!r} is not a time; "
            f"{hint}"
        )


_TRUE: Final = frozenset({"true", "t", "yes", "y", "1", "1.0"})
_FALSE: Final = frozenset({"false", "f", "no", "n", "0", "0.0", ""})


def as_bool(values: pd.Series, table: str, column: str) -> NDArray[np.bool_]:
    """A flag column as booleans; missing values are False.

    Booleans pass through; numbers are true when non-zero; text (a table stored through
    Parquet as strings) must read true/false, yes/no or 1/0 in any case. ``bool("False")`` is
    True in Python, so text is never cast directly.

    Raises
    ------
    SchemaError
        If a text value is none of those (names the table, column and row).
    """
    s = pd.Series(values)
    if pd.api.types.is_bool_dtype(s) and not s.isna().any():
        return np.asarray(s, dtype=bool)
    if pd.api.types.is_numeric_dtype(s):
        return np.asarray(s.fillna(0) != 0, dtype=bool)
    text = s.astype(object).where(s.notna(), "").astype(str).str.strip().str.lower()
    true = text.isin(_TRUE).to_numpy()
    bad = ~(true | text.isin(_FALSE).to_numpy())
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise SchemaError(
            f"ReportInputs.{table}: column {column!r}, row {i}: {s.iloc[i]!r} is not a flag; "
            "use true/false"
        )
    return true


def _check_rows(
    frame: pd.DataFrame, bad: NDArray[np.bool_], table: str, what: str, key: str
) -> None:
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise DomainError(
            f"ReportInputs.{table}: row {i} ({key} {frame[key].iloc[i]!r}): {what} "
            f"({int(np.count_nonzero(bad))} rows affected); fix or drop those rows"
        )


# -- building inputs from magfuse objects ------------------------------------------------------


def report_inputs_from_parameters(
    params: StationParameters,
    fused: FusedMagnitudes,
    *,
    model_meta: Mapping[str, Any] | None = None,
    pairs: pd.DataFrame | None = None,
    epochs: pd.DataFrame | None = None,
    coordinates: pd.DataFrame | None = None,
    distance_km: NDArray[np.float64] | None = None,
    dof: NDArray[np.float64] | None = None,
    uncalibrated: NDArray[np.bool_] | None = None,
    outlier_weight: float = 0.3,
) -> ReportInputs:
    """Report inputs from fitted station parameters and fused events.

    Parameters
    ----------
    params : StationParameters
        The model (bias, Var b̂, σ̃², flags, flagged pairs).
    fused : FusedMagnitudes
        Network magnitudes of the report window, fused with ``params``.
    model_meta : Mapping, optional
        Version, window, anchor, ...; ``magnitude_type`` defaults to the model's.
    pairs, epochs, coordinates : pandas.DataFrame, optional
        Pair tests, drift alarms and station coordinates (module docstring).
    distance_km : ndarray, shape (n_rows,), optional
        Epicentral distance of each contribution row (e.g. ``ObservationSet.distance_km``).
    dof : ndarray, shape (K,), optional
        Effective degrees of freedom of each unit's σ̃ (``RemlEmFit.dof``).
    uncalibrated : ndarray of bool, shape (K,), optional
        ``RemlEmFit.uncalibrated``.
    outlier_weight : float, default=0.3
        Readings with a robust weight below this count as outliers (docs/estimator.md §6).

    Returns
    -------
    ReportInputs

    Notes
    -----
    :class:`StationParameters` carries no reading counts, so ``n_events`` and
    ``outlier_rate`` are computed here from ``fused.contributions`` (detected rows mapped to
    the unit; outliers are rows with robust weight below ``outlier_weight``), and
    ``weight_sum`` is the count of those rows (no time weighting). ``partner`` comes from
    ``params.pairs``.
    """
    K = params.n_units
    ids = params.unit_ids.astype(str)
    co = fused.contributions
    unit = codes_in(co["unit_id"], pd.Index(ids))
    if "detected" in co.columns:
        det = as_bool(co["detected"], "contributions", "detected")
    else:
        det = np.ones(len(co), dtype=bool)
    ok = (unit >= 0) & det
    n = np.bincount(unit[ok], minlength=K).astype(np.int64)
    rw = np.asarray(co["robust_weight"], dtype=np.float64)
    out = ok & (rw < outlier_weight)
    n_out = np.bincount(unit[out], minlength=K)
    in_gls = ok & np.isfinite(rw)
    n_gls = np.bincount(unit[in_gls], minlength=K)
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = np.where(n_gls > 0, n_out / np.maximum(n_gls, 1), np.nan)
    partner = np.full(K, "", dtype=object)
    pc = params.pairs
    if pc.n_pairs:
        partner[pc.k] = ids[pc.l]
        partner[pc.l] = ids[pc.k]
    stations = pd.DataFrame(
        {
            "unit_id": ids.astype(object),
            "station_id": params.station_ids.astype(str).astype(object),
            "epoch_start": pd.to_datetime(params.epoch_start).tz_localize("UTC"),
            "epoch_end": pd.to_datetime(params.epoch_end).tz_localize("UTC"),
            "bias": params.bias.astype(float),
            "bias_se": np.sqrt(params.bias_var.astype(float)),
            "sigma": np.sqrt(params.sigma2.astype(float)),
            "dof": np.full(K, np.nan) if dof is None else np.asarray(dof, dtype=float),
            "n_events": n,
            "weight_sum": n.astype(float),
            "outlier_rate": rate,
            "prior_dominated": params.prior_dominated.astype(bool),
            "uncalibrated": np.zeros(K, bool) if uncalibrated is None else uncalibrated,
            "partner": partner,
        }
    )
    contributions = co
    if distance_km is not None:
        d = np.asarray(distance_km, dtype=np.float64)
        if d.shape[0] != len(co):
            raise DomainError(
                f"distance_km has {d.shape[0]} values for {len(co)} contribution rows; pass "
                "one distance per row of fused.contributions (ObservationSet.distance_km)"
            )
        contributions = co.assign(distance_km=d)
    meta = {"magnitude_type": params.magnitude_type, **dict(model_meta or {})}
    return ReportInputs(
        model_meta=meta,
        stations=stations,
        pairs=_empty(PAIR_COLUMNS) if pairs is None else pairs,
        epochs=_empty(EPOCH_COLUMNS) if epochs is None else epochs,
        events=fused.events,
        contributions=contributions,
        coordinates=coordinates,
    )


def codes_in(values: pd.Series | pd.Index | NDArray[Any], index: pd.Index) -> NDArray[np.int64]:
    """Position of each value in ``index``, −1 where absent or missing (vectorized)."""
    s = values if isinstance(values, pd.Series) else pd.Series(values)
    if isinstance(s.dtype, pd.CategoricalDtype):
        cat_pos = np.asarray(index.get_indexer(s.cat.categories.astype(str)), dtype=np.int64)
        codes = np.asarray(s.cat.codes, dtype=np.int64)
        out = np.full(codes.shape[0], -1, dtype=np.int64)
        ok = codes >= 0
        out[ok] = cat_pos[codes[ok]]
        return out
    missing = s.isna().to_numpy()
    pos = np.asarray(index.get_indexer(pd.Index(s.astype(str))), dtype=np.int64)
    pos[missing] = -1
    return pos
