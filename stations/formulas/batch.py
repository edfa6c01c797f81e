"""Batch entry point: station magnitudes from amplitude readings in record-schema frames.

:func:`compute_station_magnitudes` takes rows in the record-schema columns
(:data:`stations.schema.INPUT_COLUMNS`), as the readers produce them, and

1. fills missing distances (``distance_km``, ``distance_deg``, ``hypocentral_distance_km``,
   ``azimuth``) from event coordinates and station metadata (:mod:`stations.geometry`,
   :mod:`stations.metadata`), then by km <-> deg conversion, then the hypocentral distance from
   the epicentral one and the depth; given values are never overwritten;
2. computes the value of every row that has an ``amplitude`` but no value (or every row with an
   amplitude, with ``recompute``): a detection gets ``magnitude``, a non-detection
   (``detected`` false) gets ``noise_threshold`` (its amplitude is the pre-event noise,
   docs/model.md §2.1), both through the formula of the row's ``magnitude_type``:

   ============ ========================================== ===================================
   type         formula (:mod:`stations.formulas`)         inputs taken from the row
   ============ ========================================== ===================================
   ML           :func:`~stations.formulas.ml`              amplitude, hypocentral distance
   mb           :func:`~stations.formulas.mb`              amplitude, period, distance (deg),
                                                           depth
   mB_BB        :func:`~stations.formulas.mb_bb`           Vmax, distance (deg), depth, period
   Ms_20        :func:`~stations.formulas.ms_20`           amplitude, period, distance, depth
   Ms_BB        :func:`~stations.formulas.ms_bb`           Vmax, distance (deg), depth, period
   mb_Lg        :func:`~stations.formulas.mb_lg`           amplitude, distance (km), period;
                                                           γ from the options
   ============ ========================================== ===================================

   Other types (Md, Mw, MLv, ...) have no amplitude formula here: such rows are rejected with
   that reason (Mw needs a seismic moment, which the record schema does not carry);
3. writes the formula and table into ``formula`` (e.g. ``"ML IASPEI-2013 HB87"``,
   ``"mb IASPEI-2013 GR56-Q"``).

Rows outside a formula's validity domain go to ``rejected`` with the reason, unless
``allow_out_of_domain``: then they are computed and ``formula`` ends in ``" out-of-domain"``.
Rows that cannot be computed (missing or non-positive input, a wrong unit, no station
metadata for a needed distance) are always rejected; a wrong unit gives the
:class:`~stations.errors.UnitError` text of the formula. With ``check_component``, a channel
code whose component letter contradicts the formula (vertical for ML, horizontal for the
others) is out of domain as well (IASPEI: ML on horizontals, the others on the vertical).
Nothing raises for a single bad row: the whole batch comes back split into ``records`` and
``rejected``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Final

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from stations.errors import ConfigError, SchemaError, UnitError
from stations.formulas.body import MB_BB_PERIOD_RANGE_S, evaluate_mb, evaluate_mb_bb
from stations.formulas.domain import Evaluation
from stations.formulas.local import HB87, DistanceCorrection, evaluate_ml
from stations.formulas.qtable import GR56_Q, QTable
from stations.formulas.regional import evaluate_mb_lg
from stations.formulas.surface import MS_BB_PERIOD_RANGE_S, evaluate_ms_20, evaluate_ms_bb
from stations.geometry import (
    degrees_to_kilometres,
    geodesic_inverse,
    great_circle_degrees,
    hypocentral_distance_km,
    kilometres_to_degrees,
)
from stations.metadata import StationMetadata
from stations.schema import INPUT_COLUMNS

__all__ = [
    "OUT_OF_DOMAIN_FLAG",
    "REJECTED_COLUMNS",
    "ComputeOptions",
    "ComputeResult",
    "compute_station_magnitudes",
]

#: Suffix of ``formula`` for a value computed outside the formula's validity domain.
OUT_OF_DOMAIN_FLAG: Final = " out-of-domain"
#: Columns of :attr:`ComputeResult.rejected` (the quarantine columns a reader produces).
REJECTED_COLUMNS: Final = ("source_file", "source_location", "reason", "raw")
_ALL_UNITS: Final = "nm, um, mm_wa, nm/s, um/s"
_FIX_DOMAIN: Final = (
    "; outside the standard's validity domain: set allow_out_of_domain to compute it with a flag"
)


@dataclass(frozen=True, slots=True)
class ComputeOptions:
    """Choices of :func:`compute_station_magnitudes`.

    Attributes
    ----------
    allow_out_of_domain : bool, default=False
        Compute rows outside a formula's validity domain, flagged in ``formula``
        (suffix ``" out-of-domain"``), instead of rejecting them.
    recompute : bool, default=False
        Recompute rows that already carry a value, from their amplitude.
    ml_correction : DistanceCorrection, default=HB87
        Distance correction of ML (:mod:`stations.formulas.local`).
    q_table : QTable, default=GR56_Q
        Q(Δ, h) of mb and mB_BB (:mod:`stations.formulas.qtable`).
    mb_lg_gamma_per_km : float or None, default=None
        Regional attenuation γ of mb_Lg, 1/km; None rejects mb_Lg rows with that reason.
    mb_bb_period_range_s : (float, float), default=(0.2, 30.0)
        Period range of mB_BB, s (from memory).
    ms_bb_period_range_s : (float, float), default=(2.0, 60.0)
        Period range of Ms_BB, s (Havskov & Ottemöller 2010).
    use_station_elevation : bool, default=False
        Vertical leg of a filled hypocentral distance = depth + station elevation (needs
        metadata) instead of the depth alone.
    check_component : bool, default=True
        Flag a channel whose component letter contradicts the formula (see module docstring).
    """

    allow_out_of_domain: bool = False
    recompute: bool = False
    ml_correction: DistanceCorrection = HB87
    q_table: QTable = GR56_Q
    mb_lg_gamma_per_km: float | None = None
    mb_bb_period_range_s: tuple[float, float] = MB_BB_PERIOD_RANGE_S
    ms_bb_period_range_s: tuple[float, float] = MS_BB_PERIOD_RANGE_S
    use_station_elevation: bool = False
    check_component: bool = True

    def __post_init__(self) -> None:
        gamma = self.mb_lg_gamma_per_km
        if gamma is not None and not (np.isfinite(gamma) and gamma >= 0.0):
            raise ConfigError(
                "The 'mb_lg_gamma_per_km' parameter of ComputeOptions must be a float in the "
                f"range [0, inf) or None. Got {gamma!r} instead."
            )
        for name in ("mb_bb_period_range_s", "ms_bb_period_range_s"):
            low, high = getattr(self, name)
            if not (0.0 <= low < high):
                raise ConfigError(
                    f"The {name!r} parameter of ComputeOptions must be (low, high) with "
                    f"0 <= low < high. Got {(low, high)!r} instead."
                )


@dataclass(frozen=True, slots=True)
class ComputeResult:
    """Outcome of :func:`compute_station_magnitudes`.

    Attributes
    ----------
    records : pandas.DataFrame
        The accepted rows, all input columns, input index kept: values computed, distances
        filled, ``formula`` set where magfuse computed the value.
    rejected : pandas.DataFrame
        Columns ``source_file``, ``source_location``, ``reason``, ``raw`` (the input row as
        JSON); one row per rejected input row.
    flagged : pandas.DataFrame
        Columns ``source_file``, ``source_location``, ``reason``: why each row computed with
        ``allow_out_of_domain`` is outside the domain (its ``formula`` ends in
        ``" out-of-domain"``); empty otherwise.
    n_computed : int
        Rows that got a value (including flagged ones).
    n_out_of_domain : int
        Of those, rows computed outside the validity domain (``allow_out_of_domain``).
    n_distances_filled : int
        Rows where at least one distance or azimuth column was filled.
    """

    records: pd.DataFrame
    rejected: pd.DataFrame
    flagged: pd.DataFrame
    n_computed: int
    n_out_of_domain: int
    n_distances_filled: int


#: Float columns the formulas read, converted once per call.
_Columns = dict[str, NDArray[np.float64]]
_FORMULA_COLUMNS: Final = ("amplitude", "period", "event_depth")


@dataclass(frozen=True, slots=True)
class _Geometry:
    distance_km: NDArray[np.float64]
    distance_deg: NDArray[np.float64]
    hypocentral_km: NDArray[np.float64]
    azimuth: NDArray[np.float64]
    station_problem: NDArray[np.object_]


def _floats(frame: pd.DataFrame, column: str) -> NDArray[np.float64]:
    values = pd.to_numeric(frame[column], errors="coerce")
    return np.array(values.to_numpy(dtype=np.float64, na_value=np.nan), dtype=np.float64)


def _fill_geometry(
    frame: pd.DataFrame, metadata: StationMetadata | None, options: ComputeOptions
) -> _Geometry:
    """Distances and azimuth per row: given, else from coordinates, else by conversion."""
    n = len(frame)
    dist_km = _floats(frame, "distance_km")
    dist_deg = _floats(frame, "distance_deg")
    hyp = _floats(frame, "hypocentral_distance_km")
    azimuth = _floats(frame, "azimuth")
    depth = _floats(frame, "event_depth")
    ev_lat = _floats(frame, "event_latitude")
    ev_lon = _floats(frame, "event_longitude")
    elevation_km = np.full(n, np.nan)
    problem = np.full(n, "", dtype=object)

    missing = np.isnan(dist_km) | np.isnan(dist_deg) | np.isnan(azimuth)
    if options.use_station_elevation:
        missing |= np.isnan(hyp)
    need = missing & np.isfinite(ev_lat) & np.isfinite(ev_lon)
    if metadata is not None and np.any(need):
        idx = np.flatnonzero(need)
        found = metadata.lookup(
            frame["station_id"].to_numpy(dtype=object)[idx], frame["origin_time"].iloc[idx]
        )
        problem[idx] = found.problem
        ok = idx[found.found]
        st_lat, st_lon = found.latitude[found.found], found.longitude[found.found]
        elevation_km[ok] = found.elevation_m[found.found] / 1000.0
        geo = geodesic_inverse(ev_lat[ok], ev_lon[ok], st_lat, st_lon)
        deg = great_circle_degrees(ev_lat[ok], ev_lon[ok], st_lat, st_lon)
        for target, value in ((dist_km, geo.distance_km), (dist_deg, deg), (azimuth, geo.azimuth)):
            target[ok] = np.where(np.isnan(target[ok]), value, target[ok])

    dist_deg = np.where(np.isnan(dist_deg), kilometres_to_degrees(dist_km), dist_deg)
    dist_km = np.where(np.isnan(dist_km), degrees_to_kilometres(dist_deg), dist_km)
    vertical_extra = elevation_km if options.use_station_elevation else np.zeros(n)
    hyp = np.where(np.isnan(hyp), hypocentral_distance_km(dist_km, depth, vertical_extra), hyp)
    return _Geometry(dist_km, dist_deg, hyp, azimuth, problem)


@dataclass(frozen=True, slots=True)
class _Spec:
    """How one magnitude type is computed from a row."""

    evaluate: Callable[[_Columns, NDArray[np.intp], str, _Geometry], Evaluation]
    distance: str  # which _Geometry field the formula needs
    distance_name: str
    distance_text: str
    vertical: bool  # component the standard reads: vertical (True) or horizontal (False)


def _specs(options: ComputeOptions) -> dict[str, _Spec]:
    def col(columns: _Columns, rows: NDArray[np.intp], name: str) -> NDArray[np.float64]:
        return columns[name][rows]

    def ml_(f: _Columns, r: NDArray[np.intp], u: str, g: _Geometry) -> Evaluation:
        return evaluate_ml(
            col(f, r, "amplitude"), g.hypocentral_km[r], unit=u, correction=options.ml_correction
        )

    def mb_(f: _Columns, r: NDArray[np.intp], u: str, g: _Geometry) -> Evaluation:
        return evaluate_mb(
            col(f, r, "amplitude"), col(f, r, "period"), g.distance_deg[r],
            col(f, r, "event_depth"), unit=u, q_table=options.q_table,
        )  # fmt: skip

    def mbb_(f: _Columns, r: NDArray[np.intp], u: str, g: _Geometry) -> Evaluation:
        return evaluate_mb_bb(
            col(f, r, "amplitude"), g.distance_deg[r], col(f, r, "event_depth"),
            period_s=col(f, r, "period"), unit=u, q_table=options.q_table,
            period_range_s=options.mb_bb_period_range_s,
        )  # fmt: skip

    def ms20_(f: _Columns, r: NDArray[np.intp], u: str, g: _Geometry) -> Evaluation:
        return evaluate_ms_20(
            col(f, r, "amplitude"), col(f, r, "period"), g.distance_deg[r],
            col(f, r, "event_depth"), unit=u,
        )  # fmt: skip

    def msbb_(f: _Columns, r: NDArray[np.intp], u: str, g: _Geometry) -> Evaluation:
        return evaluate_ms_bb(
            col(f, r, "amplitude"), g.distance_deg[r], col(f, r, "event_depth"),
            period_s=col(f, r, "period"), unit=u, period_range_s=options.ms_bb_period_range_s,
        )  # fmt: skip

    def mblg_(f: _Columns, r: NDArray[np.intp], u: str, g: _Geometry) -> Evaluation:
        if options.mb_lg_gamma_per_km is None:
            raise ConfigError(
                "mb_Lg needs the regional attenuation coefficient: set "
                "ComputeOptions.mb_lg_gamma_per_km (1/km)"
            )
        return evaluate_mb_lg(
            col(f, r, "amplitude"), g.distance_km[r], gamma_per_km=options.mb_lg_gamma_per_km,
            period_s=col(f, r, "period"), unit=u,
        )  # fmt: skip

    hyp = (
        "give hypocentral_distance_km, or distance_km or distance_deg with event_depth, or "
        "event coordinates and event_depth with station metadata"
    )
    epi = "give distance_deg or distance_km, or event coordinates with station metadata"
    return {
        "ML": _Spec(ml_, "hypocentral_km", "hypocentral distance", hyp, vertical=False),
        "mb": _Spec(mb_, "distance_deg", "epicentral distance", epi, vertical=True),
        "mB_BB": _Spec(mbb_, "distance_deg", "epicentral distance", epi, vertical=True),
        "Ms_20": _Spec(ms20_, "distance_deg", "epicentral distance", epi, vertical=True),
        "Ms_BB": _Spec(msbb_, "distance_deg", "epicentral distance", epi, vertical=True),
        "mb_Lg": _Spec(mblg_, "distance_km", "epicentral distance", epi, vertical=True),
    }


def _row_reasons(
    frame: pd.DataFrame, mask: NDArray[np.bool_], reason: NDArray[np.object_]
) -> pd.DataFrame:
    """``source_file``, ``source_location`` and ``reason`` of the rows in ``mask``."""
    return pd.DataFrame(
        {
            "source_file": frame["source_file"].to_numpy(dtype=object)[mask].astype(str),
            "source_location": frame["source_location"].to_numpy(dtype=object)[mask].astype(str),
            "reason": reason[mask].astype(str),
        }
    )


def _wrong_component(channel: NDArray[np.object_], vertical: bool) -> NDArray[np.bool_]:
    """True where a three-letter SEED channel's component letter contradicts the formula."""
    text = pd.Series(channel, dtype=object).fillna("").astype(str).str.strip().str.upper()
    letter = text.str[2].where(text.str.len() == 3, "")
    wrong = letter.isin(["N", "E", "1", "2"]) if vertical else letter == "Z"
    return np.asarray(wrong.to_numpy(dtype=bool))


def compute_station_magnitudes(
    frame: pd.DataFrame,
    *,
    metadata: StationMetadata | None = None,
    options: ComputeOptions | None = None,
) -> ComputeResult:
    """Compute station magnitudes (and noise thresholds) from amplitudes, fill distances.

    Parameters
    ----------
    frame : pandas.DataFrame
        Rows with at least the columns :data:`stations.schema.INPUT_COLUMNS` (extra columns
        are kept), as a reader returns them: ``origin_time`` tz-aware UTC, numbers float64,
        ``detected`` bool, ``amplitude_unit`` an :class:`~stations.schema.AmplitudeUnit`
        value or null.
    metadata : StationMetadata, optional
        Station coordinates by time, to fill distances from event coordinates.
    options : ComputeOptions, optional
        Defaults: IASPEI formulas with HB87 and GR56-Q, out-of-domain rows rejected.

    Returns
    -------
    ComputeResult
        ``records`` (accepted rows) and ``rejected`` (reason per row), with counts.

    Raises
    ------
    SchemaError
        If a record-schema column is missing from ``frame``.

    Notes
    -----
    The procedure, the formula per magnitude type, and the reasons a row is rejected are in
    the module docstring. Work is vectorized per (magnitude type, unit) group.

    Examples
    --------
    >>> import pandas as pd
    >>> from stations.schema import INPUT_COLUMNS
    >>> row = dict.fromkeys(INPUT_COLUMNS)
    >>> row.update(event_id="ev1", origin_time=pd.Timestamp("2020-01-01", tz="UTC"),
    ...            station_id="XX.ABC.", magnitude_type="ML", detected=True, clipped=False,
    ...            amplitude=1.0, amplitude_unit="mm_wa", hypocentral_distance_km=100.0,
    ...            source_file="a.csv", source_location="line 2")
    >>> result = compute_station_magnitudes(pd.DataFrame([row]))
    >>> round(float(result.records["magnitude"].iloc[0]), 4), result.records["formula"].iloc[0]
    (3.0009, 'ML IASPEI-2013 HB87')
    """
    options = ComputeOptions() if options is None else options
    missing = [c for c in INPUT_COLUMNS if c not in frame.columns]
    if missing:
        raise SchemaError(
            f"compute_station_magnitudes: column {missing[0]!r} is missing; the frame must hold "
            "the record-schema columns (stations.schema.INPUT_COLUMNS)"
        )
    geometry = _fill_geometry(frame, metadata, options)
    columns = {name: _floats(frame, name) for name in _FORMULA_COLUMNS}
    amplitude = columns["amplitude"]
    detected = frame["detected"].to_numpy(dtype=bool)
    current = np.where(detected, _floats(frame, "magnitude"), _floats(frame, "noise_threshold"))
    target = ~np.isnan(amplitude) & (np.isnan(current) | options.recompute)

    ev = _evaluate_groups(frame, target, columns, geometry, options)
    value, label, reason, computable = ev.value, ev.label, ev.reason, ev.computable
    in_domain = target & (reason == "")
    flagged = target & (reason != "") & computable & options.allow_out_of_domain
    accepted = in_domain | flagged
    reject = target & ~accepted

    out, n_filled = _with_geometry(frame, geometry)
    _fill_values(out, frame, value, label, accepted, flagged, detected)
    rejected = _row_reasons(frame, reject, reason)
    rejected_rows = frame.loc[reject]
    text = rejected_rows.to_json(orient="records", lines=True, date_format="iso")
    # one JSON object per line; ujson escapes newlines inside strings (ASCII output)
    rejected["raw"] = text.rstrip("\n").split("\n") if len(rejected_rows) else []
    return ComputeResult(
        records=out.loc[~reject],
        rejected=rejected,
        flagged=_row_reasons(frame, flagged, reason),
        n_computed=int(np.count_nonzero(accepted)),
        n_out_of_domain=int(np.count_nonzero(flagged)),
        n_distances_filled=n_filled,
    )


@dataclass(slots=True, eq=False)
class _GroupResults:
    """Per-row results of the formula evaluation (NaN / "" where not evaluated)."""

    value: NDArray[np.float64]
    label: NDArray[np.object_]
    reason: NDArray[np.object_]
    computable: NDArray[np.bool_]


def _evaluate_groups(
    frame: pd.DataFrame,
    target: NDArray[np.bool_],
    columns: dict[str, NDArray[np.float64]],
    geometry: _Geometry,
    options: ComputeOptions,
) -> _GroupResults:
    """Evaluate the formula of every (magnitude type, amplitude unit) group of target rows."""
    n = len(frame)
    res = _GroupResults(
        value=np.full(n, np.nan),
        label=np.full(n, "", dtype=object),
        reason=np.full(n, "", dtype=object),
        computable=np.zeros(n, dtype=bool),
    )
    mtype = frame["magnitude_type"].astype(str).to_numpy(dtype=object)
    unit = frame["amplitude_unit"].astype(object).where(frame["amplitude_unit"].notna(), "")
    unit_arr = unit.astype(str).to_numpy(dtype=object)
    channel = frame["channel"].to_numpy(dtype=object)
    specs = _specs(options)
    groups = pd.DataFrame({"t": mtype, "u": unit_arr})[target].groupby(["t", "u"]).indices
    for key, positions in groups.items():
        kind, unit_name = (str(k) for k in key)  # type: ignore[attr-defined]
        rows = np.flatnonzero(target)[positions]
        spec = specs.get(kind)
        if spec is None:
            res.reason[rows] = (
                f"no amplitude formula for magnitude type {kind} in magfuse (formulas: "
                f"{', '.join(specs)}); supply the station magnitude itself"
            )
            continue
        if unit_name == "":
            res.reason[rows] = (
                f"{kind}: amplitude_unit is missing; give the unit of the amplitude ({_ALL_UNITS})"
            )
            continue
        try:
            evaluation = spec.evaluate(columns, rows, unit_name, geometry)
        except (UnitError, ConfigError) as exc:
            res.reason[rows] = str(exc)
            continue
        _store_group(res, rows, kind, spec, evaluation, geometry, channel[rows], options)
    return res


def _store_group(
    res: _GroupResults,
    rows: NDArray[np.int64],
    kind: str,
    spec: _Spec,
    evaluation: Evaluation,
    geometry: _Geometry,
    channel: NDArray[np.object_],
    options: ComputeOptions,
) -> None:
    """Store one group's magnitudes and the reason of each row that is not in the domain."""
    why = evaluation.reason.copy()
    lacking = np.isnan(getattr(geometry, spec.distance)[rows])
    station_problem = geometry.station_problem[rows][lacking].astype(str)
    why[lacking] = np.where(
        station_problem != "",
        f"{spec.distance_name} is missing: " + station_problem,
        f"{spec.distance_name} is missing: {spec.distance_text}",
    )
    if options.check_component:
        wrong = _wrong_component(channel, spec.vertical) & (why == "")
        side, need = ("horizontal", "the vertical") if spec.vertical else ("vertical", "horizontal")
        why[wrong] = (
            "channel "
            + pd.Series(channel[wrong], dtype=object).astype(str)
            + f" is {side}; {kind} is defined on {need} components"
        ).to_numpy(dtype=object)
    ok = evaluation.computable
    res.value[rows] = evaluation.magnitude
    res.label[rows] = evaluation.formula
    res.computable[rows] = ok
    bad = why != ""
    fix = np.where(ok[bad], _FIX_DOMAIN, "; fix or complete the row").astype(object)
    fix[lacking[bad]] = ""  # the distance text carries its own fix
    res.reason[rows[bad]] = evaluation.formula + ": " + why[bad] + fix


def _with_geometry(frame: pd.DataFrame, geometry: _Geometry) -> tuple[pd.DataFrame, int]:
    """A copy of ``frame`` with the filled distances and azimuths; rows that gained one."""
    out = frame.copy()
    for column, filled in (
        ("distance_km", geometry.distance_km),
        ("distance_deg", geometry.distance_deg),
        ("hypocentral_distance_km", geometry.hypocentral_km),
        ("azimuth", geometry.azimuth),
    ):
        out[column] = filled
    before = np.column_stack(
        [_floats(frame, c) for c in ("distance_km", "distance_deg", "hypocentral_distance_km",
                                     "azimuth")]
    )  # fmt: skip
    after = np.column_stack(
        [geometry.distance_km, geometry.distance_deg, geometry.hypocentral_km, geometry.azimuth]
    )
    return out, int(np.count_nonzero((np.isnan(before) & ~np.isnan(after)).any(axis=1)))


def _fill_values(
    out: pd.DataFrame,
    frame: pd.DataFrame,
    value: NDArray[np.float64],
    label: NDArray[np.object_],
    accepted: NDArray[np.bool_],
    flagged: NDArray[np.bool_],
    detected: NDArray[np.bool_],
) -> None:
    """Write the accepted magnitudes, thresholds and formula labels into ``out``."""
    magnitude = _floats(frame, "magnitude")
    threshold = _floats(frame, "noise_threshold")
    magnitude[accepted & detected] = value[accepted & detected]
    threshold[accepted & ~detected] = value[accepted & ~detected]
    out["magnitude"] = magnitude
    out["noise_threshold"] = threshold
    label[flagged] = label[flagged] + OUT_OF_DOMAIN_FLAG
    formula = out["formula"].astype(object).to_numpy(copy=True)
    formula[accepted] = label[accepted]
    formula_col = pd.Series(formula, index=out.index, dtype=object).where(pd.notna(formula), None)
    keep_dtype = pd.api.types.is_string_dtype(frame["formula"].dtype)
    out["formula"] = formula_col.astype(frame["formula"].dtype) if keep_dtype else formula_col
