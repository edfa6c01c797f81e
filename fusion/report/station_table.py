"""The station reliability table: one row per station unit, written as CSV and Parquet.

Columns (magnitudes in magnitude units; times UTC):

===================== =====================================================================
column                meaning
===================== =====================================================================
station_id, unit_id   ``NET.STA.LOC`` and the model unit (station epoch)
epoch_start/end       bounds of the unit (null: open)
bias, bias_se         b̂ relative to the anchor and its SE
bias_ci_low/high      b̂ ± z·SE, z = Φ⁻¹((1 + level)/2) (normal interval)
sigma                 moderated error SD σ̃
sigma_ci_low/high     chi-square interval σ̃·sqrt(d/χ²_d(1 − α/2)) .. σ̃·sqrt(d/χ²_d(α/2)), d = dof
                      (the usual interval for a normal SD with d degrees of freedom; null
                      without dof)
dof                   degrees of freedom d of σ̃ (input)
sigma_rank            1 = smallest σ̃
n_events              readings the fit used (input; null if not given)
fit_outlier_rate      outlier fraction in the fit (input)
n_readings            detections of the unit in the report window
weight_share          Σ weight of the unit's rows / number of events with a magnitude: the
                      share of all network weight the unit carries (shares sum to 1 over units
                      plus stations the model does not know)
mean_weight           Σ weight / n_readings: the unit's typical weight when it reports
outlier_rate          window readings with robust weight < ``outlier_weight`` / readings
                      with a robust weight
residual_mean         robust-weighted mean residual (corrected − network magnitude) over the
                      window's events with >= 2 stations, selection-prone readings left out
                      (see fusion.report.joined); residual_mean_t its t ratio
residual_sd           SD of those residuals
distance_slope        weighted slope of residual on log10(epicentral distance / km), magnitude
                      units per decade; distance_slope_se, distance_t, distance_n
magnitude_slope       the same against the network magnitude (magnitude units per magnitude
                      unit); magnitude_slope_se, magnitude_t, magnitude_n
prior_dominated       input flag
uncalibrated          input flag
flags                 ';'-joined :class:`StationFlag` values
partners              correlated partners with ρ̂ and its interval, '; '-joined
n_drift_alarms        drift alarms whose alarm time lies in the unit's epoch
drift_alarms          'change DATE (between DATE and DATE), up/down STEP ± SE; alarm DATE'
===================== =====================================================================

Trend t ratios and the |t| > 3 rule: :mod:`fusion.model.diagnostics`. ``residual-offset`` uses the
same rule on the mean residual: under the model each residual has mean 0, so a mean residual
with |t| > 3 says the bias has moved since the fit (or the unit's window residuals are skewed by
detection, docs/censoring.md §9).

The Parquet file is written through :data:`STATION_REPORT_SCHEMA` (units in field metadata,
schema name and version in the file's key-value metadata).
"""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Final

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq
from numpy.typing import NDArray
from scipy import special

from fusion.model.diagnostics import (
    TREND_T_ALARM,
    grouped_weighted_mean,
    grouped_wls_slope,
    sigma_interval,
    unit_usage,
)
from fusion.report.inputs import ReportInputs, as_bool, codes_in
from fusion.report.joined import JoinedRows, join_rows
from stations.errors import ConfigError

__all__ = [
    "ATTENTION_FLAGS",
    "STATION_REPORT_SCHEMA",
    "STATION_REPORT_SCHEMA_VERSION",
    "StationFlag",
    "station_reliability_table",
    "write_station_table",
]

STATION_REPORT_SCHEMA_VERSION: Final = "1"


class StationFlag(StrEnum):
    """Short names joined by ';' in the ``flags`` column (meanings in the report's notes)."""

    distance_trend = "distance-trend"  #: |t| > 3 for residual against log10 distance
    magnitude_trend = "magnitude-trend"  #: |t| > 3 for residual against network magnitude
    residual_offset = "residual-offset"  #: |t| > 3 for the mean residual in the window
    many_outliers = "many-outliers"  #: window outlier rate above ``outlier_rate_alert``
    drift_alarm = "drift-alarm"  #: a CUSUM bias-step alarm in the unit's epoch
    correlated = "correlated-pair"  #: a flagged correlated partner
    uncalibrated = "uncalibrated"  #: no anchor in the unit's component
    prior_dominated = "prior-dominated"  #: the prior outweighs the data (few readings)


#: Flags that earn a station a full section in the HTML report (prior-dominated alone does
#: not: it is the normal state of a new station).
ATTENTION_FLAGS: Final = frozenset(StationFlag) - {StationFlag.prior_dominated}

_FLAG_ORDER: Final = tuple(StationFlag)

#: What each station flag means, for the sidecar of the written table.
_FLAG_NOTE: Final = (
    "distance-trend, magnitude-trend: residuals trend with log10 distance or with the network "
    "magnitude (|t| > 3); residual-offset: the mean residual in the window differs from 0 "
    "(|t| > 3); many-outliers: the window outlier rate is above the alert rate; drift-alarm: a "
    "bias-step alarm in the unit's epoch; correlated: the unit has a flagged correlated "
    "partner; uncalibrated: no reference station reaches the unit; prior-dominated: the prior "
    "carries more information than the unit's few readings."
)


def _f(frame: pd.DataFrame, name: str, fill: float = np.nan) -> NDArray[np.float64]:
    if name not in frame.columns:
        return np.full(len(frame), fill)
    return np.asarray(pd.to_numeric(frame[name], errors="coerce"), dtype=np.float64)


def _b(frame: pd.DataFrame, name: str, table: str = "stations") -> NDArray[np.bool_]:
    if name not in frame.columns:
        return np.zeros(len(frame), dtype=bool)
    return as_bool(frame[name], table, name)


def _utc(frame: pd.DataFrame, name: str) -> pd.Series:
    if name not in frame.columns:
        return pd.Series(pd.NaT, index=frame.index, dtype="datetime64[us, UTC]")
    return pd.to_datetime(frame[name], utc=True).astype("datetime64[us, UTC]")


def _check_level(level: float, where: str) -> None:
    if not (isinstance(level, (int, float)) and 0.0 < float(level) < 1.0):
        raise ConfigError(
            f"The 'level' parameter of {where} must be a float in the range (0, 1). "
            f"Got {level!r} instead."
        )


def _flag_text(bits: NDArray[np.int64]) -> NDArray[np.object_]:
    uniq, inv = np.unique(bits, return_inverse=True)
    text = np.array(
        [";".join(str(f) for i, f in enumerate(_FLAG_ORDER) if int(u) >> i & 1) for u in uniq],
        dtype=object,
    )
    return text[inv]


def _partner_text(inputs: ReportInputs) -> NDArray[np.object_]:
    """Partners of each unit: flagged pairs of the pair table (by unit or station id), plus
    the ``partner`` column of the station table; '; '-joined, with ρ̂ and interval if known."""
    st = inputs.stations
    K = len(st)
    unit_ids = pd.Index(st["unit_id"].astype(str))
    station_ids = st["station_id"].astype(str).to_numpy()
    parts: list[pd.DataFrame] = []
    pairs = inputs.pairs
    if len(pairs):
        fl = pairs[as_bool(pairs["flagged"], "pairs", "flagged")]
        if len(fl):
            text = (
                "ρ "
                + fl["rho_hat"].map("{:.2f}".format)
                + " ["
                + fl["rho_ci_low"].map("{:.2f}".format)
                + ", "
                + fl["rho_ci_high"].map("{:.2f}".format)
                + "]"
            )
            a = fl["station_k"].astype(str).to_numpy()
            b = fl["station_l"].astype(str).to_numpy()
            side = pd.DataFrame(
                {
                    "me": np.concatenate([a, b]),
                    "other": np.concatenate([b, a]),
                    "text": np.concatenate([text.to_numpy(), text.to_numpy()]),
                }
            )
            # A pair id may be a unit id or a station id: match units on either.
            by_unit = codes_in(side["me"], unit_ids)
            hits = [pd.DataFrame({"k": by_unit[by_unit >= 0], "row": np.flatnonzero(by_unit >= 0)})]
            st_frame = pd.DataFrame({"station_id": station_ids, "k": np.arange(K)})
            rest = side.loc[by_unit < 0].reset_index().rename(columns={"index": "row"})
            merged = rest.merge(st_frame, left_on="me", right_on="station_id")
            hits.append(merged[["k", "row"]])
            hit = pd.concat(hits, ignore_index=True)
            parts.append(
                pd.DataFrame(
                    {
                        "k": hit["k"].to_numpy(),
                        "text": side["other"].to_numpy()[hit["row"].to_numpy()]
                        + " ("
                        + side["text"].to_numpy()[hit["row"].to_numpy()]
                        + ")",
                        "other": side["other"].to_numpy()[hit["row"].to_numpy()],
                    }
                )
            )
    if "partner" in st.columns:
        p = st["partner"].fillna("").astype(str).to_numpy()
        has = np.flatnonzero(p != "")
        parts.append(pd.DataFrame({"k": has, "text": p[has], "other": p[has]}))
    out = np.full(K, "", dtype=object)
    if not parts:
        return out
    allp = pd.concat(parts, ignore_index=True)
    if not len(allp):
        return out
    # A partner named by both sources is listed once (the pair table's text, which has ρ̂).
    allp["other_station"] = allp["other"].str.split("@").str[0]
    allp = allp.drop_duplicates(subset=["k", "other_station"], keep="first")
    joined = allp.groupby("k", sort=True)["text"].agg("; ".join)
    out[joined.index.to_numpy(dtype=np.int64)] = joined.to_numpy()
    return out


def _drift(inputs: ReportInputs) -> tuple[NDArray[np.int64], NDArray[np.object_]]:
    """Drift alarms per unit: the unit of the alarm's station whose epoch holds the alarm
    time (else the station's last unit)."""
    st = inputs.stations
    K = len(st)
    n = np.zeros(K, dtype=np.int64)
    text = np.full(K, "", dtype=object)
    ep = inputs.epochs
    if not len(ep):
        return n, text
    units = pd.DataFrame(
        {
            "station_id": st["station_id"].astype(str).to_numpy(),
            "k": np.arange(K),
            "start": _utc(st, "epoch_start"),
            "end": _utc(st, "epoch_end"),
        }
    )
    alarms = pd.DataFrame(
        {
            "station_id": ep["station_id"].astype(str).to_numpy(),
            "change": _utc(ep, "change_time").to_numpy(),
            "alarm": _utc(ep, "alarm_time").to_numpy(),
            "direction": _f(ep, "direction", 0.0),
            "step": _f(ep, "step", np.nan),
            "step_se": _f(ep, "step_se", np.nan),
            "low": _utc(ep, "change_time_low").to_numpy()
            if "change_time_low" in ep.columns
            else pd.NaT,
            "high": _utc(ep, "change_time_high").to_numpy()
            if "change_time_high" in ep.columns
            else pd.NaT,
            "a": np.arange(len(ep)),
        }
    )
    m = alarms.merge(units, on="station_id")
    inside = (m["start"].isna() | (m["start"] <= m["alarm"])) & (
        m["end"].isna() | (m["alarm"] < m["end"])
    )
    chosen = m[inside].drop_duplicates("a")
    last = m.sort_values(["a", "start"], na_position="first").drop_duplicates("a", keep="last")
    chosen = pd.concat([chosen, last[~last["a"].isin(chosen["a"])]], ignore_index=True)
    if not len(chosen):
        return n, text
    chosen = chosen.sort_values(["k", "change"])
    step = chosen["step"].to_numpy(dtype=float)
    fitted = np.isfinite(step) & (step != 0.0)
    word = np.where(
        np.where(fitted, step, chosen["direction"].to_numpy(dtype=float)) > 0, "up", "down"
    )
    size = np.where(
        fitted,
        [
            f" {v:+.2f} ± {e:.2f}"
            for v, e in zip(step, chosen["step_se"].to_numpy(float), strict=True)
        ],
        "",
    )

    def day(col: str) -> NDArray[np.object_]:
        t = pd.to_datetime(chosen[col], utc=True)
        return t.dt.strftime("%Y-%m-%d").fillna("?").to_numpy().astype(object)

    span = np.where(
        chosen["low"].notna().to_numpy(),
        " (between " + day("low") + " and " + day("high") + ")",
        "",
    )
    label = (
        "change "
        + day("change")
        + span.astype(object)
        + ", "
        + word.astype(object)
        + size.astype(object)
        + "; alarm "
        + day("alarm")
    )
    k = chosen["k"].to_numpy(dtype=np.int64)
    n = np.bincount(k, minlength=K).astype(np.int64)
    joined = pd.Series(label, index=k).groupby(level=0).agg("; ".join)
    text[joined.index.to_numpy(dtype=np.int64)] = joined.to_numpy()
    return n, text


def station_reliability_table(
    inputs: ReportInputs,
    *,
    level: float = 0.95,
    trend_t: float = TREND_T_ALARM,
    min_trend_rows: int = 20,
    outlier_weight: float = 0.3,
    outlier_rate_alert: float = 0.02,
    joined: JoinedRows | None = None,
) -> pd.DataFrame:
    """One row per station unit with reliability figures and flags (module docstring).

    Parameters
    ----------
    inputs : ReportInputs
        Validated inputs (:meth:`ReportInputs.validated`), already cut to the report window.
    level : float, default=0.95
        Coverage of the bias and σ intervals, a fraction in (0, 1).
    trend_t : float, default=3.0
        |t| above this flags a trend or a residual offset.
    min_trend_rows : int, default=20
        Fewer usable readings give no trend (NaN) and no trend flag.
    outlier_weight : float, default=0.3
        A reading with robust weight below this is an outlier (docs/estimator.md §6).
    outlier_rate_alert : float, default=0.02
        ``many-outliers`` above this window outlier rate. Under the Gaussian model a reading
        gets ω < 0.3 (ν = 4) only beyond |u| ≈ 3.56, probability 0.04 %; the simulator of
        docs/simulation.md plants 1 % outlier cells. 2 % is chosen here (common practice, no
        source).
    joined : JoinedRows, optional
        Pre-joined rows (the report passes its own; computed if absent).

    Returns
    -------
    pandas.DataFrame
        Columns in the order of :data:`STATION_REPORT_SCHEMA`.

    Raises
    ------
    ConfigError
        A parameter is out of range.
    """
    where = "station_reliability_table"
    _check_level(level, where)
    if not (trend_t > 0.0):
        raise ConfigError(
            f"The 'trend_t' parameter of {where} must be a float in the range (0, inf). "
            f"Got {trend_t!r} instead."
        )
    st = inputs.stations
    K = len(st)
    jr = join_rows(inputs) if joined is None else joined
    z = float(special.ndtri(0.5 + 0.5 * level))
    bias = _f(st, "bias")
    bias_se = _f(st, "bias_se")
    sigma = _f(st, "sigma")
    dof = _f(st, "dof")
    s_lo, s_hi = sigma_interval(sigma, dof, level)
    rank = pd.Series(sigma).rank(method="min").to_numpy()

    # -- window figures per unit ---------------------------------------------------------
    n_est = int(np.count_nonzero(np.isfinite(pd.to_numeric(inputs.events["magnitude"]))))
    usage = unit_usage(
        jr.unit, jr.detected, jr.weight, jr.robust_weight, K, n_est, outlier_weight=outlier_weight
    )
    n_read, weight_share = usage.n_readings, usage.weight_share
    mean_weight, outlier_rate = usage.mean_weight, usage.outlier_rate

    a = jr.analysable
    rw = np.where(np.isfinite(jr.robust_weight), jr.robust_weight, 1.0)
    g = np.where(a, jr.unit, -1)
    offset = grouped_weighted_mean(g, jr.residual, rw, K, min_rows=min_trend_rows)
    r_mean, r_sd, r_t = offset.mean, offset.sd, offset.t

    with np.errstate(invalid="ignore", divide="ignore"):
        logd = np.log10(jr.distance_km)
    dist = grouped_wls_slope(g, logd, jr.residual, rw, K, min_rows=min_trend_rows)
    mag = grouped_wls_slope(g, jr.event_magnitude, jr.residual, rw, K, min_rows=min_trend_rows)

    # -- flags ---------------------------------------------------------------------------
    prior = _b(st, "prior_dominated")
    uncal = _b(st, "uncalibrated")
    partners = _partner_text(inputs)
    n_drift, drift_text = _drift(inputs)
    masks = {
        StationFlag.distance_trend: np.abs(np.nan_to_num(dist.t)) > trend_t,
        StationFlag.magnitude_trend: np.abs(np.nan_to_num(mag.t)) > trend_t,
        StationFlag.residual_offset: np.abs(np.nan_to_num(r_t)) > trend_t,
        StationFlag.many_outliers: np.nan_to_num(outlier_rate) > outlier_rate_alert,
        StationFlag.drift_alarm: n_drift > 0,
        StationFlag.correlated: partners != "",
        StationFlag.uncalibrated: uncal,
        StationFlag.prior_dominated: prior,
    }
    bits = np.zeros(K, dtype=np.int64)
    for i, f in enumerate(_FLAG_ORDER):
        bits |= np.where(masks[f], 1 << i, 0)

    if "n_events" in st.columns:
        n_fit = pd.Series(pd.to_numeric(st["n_events"]).to_numpy(), dtype="Int64")
    else:
        n_fit = pd.Series([pd.NA] * K, dtype="Int64")
    return pd.DataFrame(
        {
            "station_id": st["station_id"].astype(str).to_numpy(),
            "unit_id": st["unit_id"].astype(str).to_numpy(),
            "epoch_start": _utc(st, "epoch_start").to_numpy(),
            "epoch_end": _utc(st, "epoch_end").to_numpy(),
            "bias": bias,
            "bias_se": bias_se,
            "bias_ci_low": bias - z * bias_se,
            "bias_ci_high": bias + z * bias_se,
            "sigma": sigma,
            "sigma_ci_low": s_lo,
            "sigma_ci_high": s_hi,
            "dof": dof,
            "sigma_rank": rank.astype(np.int64),
            "n_events": n_fit.array,
            "fit_outlier_rate": _f(st, "outlier_rate"),
            "n_readings": n_read,
            "weight_share": weight_share,
            "mean_weight": mean_weight,
            "outlier_rate": outlier_rate,
            "residual_mean": r_mean,
            "residual_mean_t": r_t,
            "residual_sd": r_sd,
            "distance_slope": dist.slope,
            "distance_slope_se": dist.se,
            "distance_t": dist.t,
            "distance_n": dist.n,
            "magnitude_slope": mag.slope,
            "magnitude_slope_se": mag.se,
            "magnitude_t": mag.t,
            "magnitude_n": mag.n,
            "prior_dominated": prior,
            "uncalibrated": uncal,
            "flags": _flag_text(bits),
            "partners": partners,
            "n_drift_alarms": n_drift,
            "drift_alarms": drift_text,
        }
    )


# -- files -------------------------------------------------------------------------------------


def _fld(name: str, typ: pa.DataType, unit: str | None, doc: str) -> pa.Field:
    meta = {"doc": doc}
    if unit is not None:
        meta["unit"] = unit
    return pa.field(name, typ, nullable=True, metadata=meta)


_MAG = "magnitude units"
_UTC = pa.timestamp("us", tz="UTC")

STATION_REPORT_SCHEMA: Final = pa.schema(
    [
        _fld("station_id", pa.string(), None, "FDSN NET.STA.LOC"),
        _fld(
            "unit_id",
            pa.string(),
            None,
            "station unit (a station epoch): NET.STA.LOC, plus @YYYY-MM-DD after the first",
        ),
        _fld("epoch_start", _UTC, "UTC", "start of the unit; null: open"),
        _fld("epoch_end", _UTC, "UTC", "end of the unit (exclusive); null: open"),
        _fld("bias", pa.float64(), _MAG, "station bias relative to the anchor"),
        _fld("bias_se", pa.float64(), _MAG, "standard error of the bias"),
        _fld("bias_ci_low", pa.float64(), _MAG, "normal interval, level in file metadata"),
        _fld("bias_ci_high", pa.float64(), _MAG, "normal interval, level in file metadata"),
        _fld("sigma", pa.float64(), _MAG, "moderated error SD"),
        _fld("sigma_ci_low", pa.float64(), _MAG, "chi-square interval with dof"),
        _fld("sigma_ci_high", pa.float64(), _MAG, "chi-square interval with dof"),
        _fld("dof", pa.float64(), None, "degrees of freedom of sigma"),
        _fld("sigma_rank", pa.int64(), None, "1 = smallest sigma"),
        _fld("n_events", pa.int64(), None, "readings used by the fit"),
        _fld("fit_outlier_rate", pa.float64(), "fraction", "outlier fraction in the fit"),
        _fld("n_readings", pa.int64(), None, "detections in the report window"),
        _fld("weight_share", pa.float64(), "fraction", "share of all network weight"),
        _fld("mean_weight", pa.float64(), "fraction", "mean normalised weight per reading"),
        _fld("outlier_rate", pa.float64(), "fraction", "window readings with robust weight<0.3"),
        _fld("residual_mean", pa.float64(), _MAG, "robust-weighted mean residual"),
        _fld("residual_mean_t", pa.float64(), None, "t ratio of residual_mean"),
        _fld("residual_sd", pa.float64(), _MAG, "SD of the residuals"),
        _fld("distance_slope", pa.float64(), "magnitude units per decade of km", "WLS slope"),
        _fld("distance_slope_se", pa.float64(), "magnitude units per decade of km", "its SE"),
        _fld("distance_t", pa.float64(), None, "slope / SE"),
        _fld("distance_n", pa.int64(), None, "readings in the distance fit"),
        _fld("magnitude_slope", pa.float64(), "magnitude units per magnitude unit", "WLS"),
        _fld("magnitude_slope_se", pa.float64(), "magnitude units per magnitude unit", "SE"),
        _fld("magnitude_t", pa.float64(), None, "slope / SE"),
        _fld("magnitude_n", pa.int64(), None, "readings in the magnitude fit"),
        _fld("prior_dominated", pa.bool_(), None, "the prior outweighs the data"),
        _fld("uncalibrated", pa.bool_(), None, "no anchor in the unit's component"),
        _fld("flags", pa.string(), None, "';'-joined station flags (see the notes)"),
        _fld("partners", pa.string(), None, "correlated partners with rho"),
        _fld("n_drift_alarms", pa.int64(), None, "CUSUM alarms in the epoch"),
        _fld(
            "drift_alarms",
            pa.string(),
            None,
            "estimated change time with interval, fitted step, alarm date",
        ),
    ],
    metadata={
        "magfuse.schema": "station_report",
        "magfuse.schema_version": STATION_REPORT_SCHEMA_VERSION,
    },
)


def write_station_table(
    table: pd.DataFrame,
    csv_path: Path,
    parquet_path: Path,
    *,
    metadata: dict[str, str] | None = None,
) -> None:
    """Write the station table as CSV and Parquet, each with a README sidecar.

    Both files follow the conventions of the exports (:mod:`fusion.export.sidecar`): CSV times
    are ISO 8601 UTC, booleans ``true``/``false``; the Parquet file has the declared schema
    (units and descriptions in field metadata) and the advisory caution in its key-value
    metadata (``magfuse.advisory``); each file gets ``<file>.README.txt`` with the caution and
    every column with its unit and description.

    Parameters
    ----------
    table : pandas.DataFrame
        From :func:`station_reliability_table`.
    csv_path, parquet_path : Path
        Files to write (replaced if present).
    metadata : dict of str, optional
        Extra key-value metadata for the Parquet file (model version, level, window).
    """
    from fusion.advisory import ADVISORY
    from fusion.export.formats import ExportFormat
    from fusion.export.sidecar import readme_text, write_readme
    from fusion.export.tabular import csv_ready

    arrow = pa.Table.from_pandas(table, schema=STATION_REPORT_SCHEMA, preserve_index=False)
    meta = dict(STATION_REPORT_SCHEMA.metadata or {})
    meta[b"magfuse.advisory"] = ADVISORY.encode()
    meta.update({k.encode(): v.encode() for k, v in (metadata or {}).items()})
    arrow = arrow.replace_schema_metadata(meta)
    pq.write_table(arrow, parquet_path)
    # Arrow's CSV writer: booleans true/false and quoting as in every export
    pa_csv.write_csv(
        csv_ready(arrow),
        csv_path,
        write_options=pa_csv.WriteOptions(include_header=True, quoting_style="needed"),
    )
    columns = [
        (
            f.name,
            (f.metadata or {}).get(b"unit", b"-").decode(),
            (f.metadata or {}).get(b"doc", b"").decode(),
        )
        for f in STATION_REPORT_SCHEMA
    ]
    facts = [
        (k.removeprefix("magfuse.").replace("_", " ").capitalize(), v or "-")
        for k, v in (metadata or {}).items()
    ]
    for path, fmt in ((csv_path, ExportFormat.csv), (parquet_path, ExportFormat.parquet)):
        text = readme_text(
            title="station reliability table",
            data_name=Path(path).name,
            fmt=fmt,
            rows=arrow.num_rows,
            provenance=facts,
            columns=columns,
            notes=[
                "One row per station unit: a station epoch, i.e. a station (NET.STA.LOC) over "
                "the time span in which its bias stayed the same; a station whose bias stepped "
                "has one unit per epoch (unit_id NET.STA.LOC@YYYY-MM-DD after the first).",
                f"Station flags ({', '.join(StationFlag)}): {_FLAG_NOTE}",
            ],
        )
        write_readme(Path(path), text)
