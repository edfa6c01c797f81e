"""Label-free check of model versions (``magfuse check``): is a model better, without ground truth?

On the stored readings of a window (default the ``[learn] window_days`` before the latest origin
time), every compared estimator is scored in two ways that need no true magnitudes
(docs/validation.md):

- **split-half agreement** (:func:`fusion.model.agreement.split_half_network_agreement`): each
  event's stations are split at random into halves, the network magnitude of each half is
  computed, and the SD over events of their difference is the agreement SD (smaller is better),
  repeated over ``seeds`` random splits with its spread across seeds;
- **held-out station prediction** (:func:`fusion.model.validation.held_out_prediction`): each
  reading of an event with at least three stations is predicted from the other stations; the
  mean squared error (smaller is better), the z scores' SD (1 under the model) and the
  coverage of the nominal interval, pooled and per station (the per-station predictive scores).

The estimators are the examined version (a candidate, or any version), the active model when it
is another version, and the station-corrected mean (equal weights, classical corrections; no
model). The check is in-sample for fitted versions when the window overlaps their learning
window, as it does by default; every estimator is scored on the same events and splits.

:meth:`CheckReport.candidate_worse` is the nightly policy's test: a candidate whose agreement
SD exceeds the active model's by more than the seed-to-seed spread of the paired difference
needs review.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import timedelta
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from fusion.model.agreement import (
    AgreementResult,
    RowEstimator,
    split_half_network_agreement,
    station_corrections,
)
from fusion.observations import ObservationSet
from stations.errors import InsufficientDataError, ModelNotFoundError

if TYPE_CHECKING:
    from fusion.model.parameters import StationParameters
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry
    from stations.store import StationMagnitudeStore

__all__ = ["CORRECTED_MEAN", "CheckReport", "check_models", "check_observations"]

#: Name of the model-free reference estimator.
CORRECTED_MEAN = "station-corrected mean"


@dataclass(frozen=True, slots=True)
class CheckReport:
    """Scores of the compared estimators (module docstring).

    Attributes
    ----------
    magnitude_type : str
    window_start, window_end : str
        ISO 8601 UTC bounds of the readings used ("" when not from a store).
    examined : str
        Name of the examined estimator (a version id).
    active : str or None
        Active version id when it is compared too.
    agreement : AgreementResult
    held_out : pandas.DataFrame
        One row per estimator: ``estimator``, ``n_readings``, ``mse`` (magnitude units²),
        ``z_sd``, ``coverage`` (fraction within the nominal ``level`` interval; NaN for the
        corrected mean, which has no variance model).
    per_station : pandas.DataFrame
        Per-station predictive scores of the examined version: ``station_id`` (unit id),
        ``n_readings``, ``mse``, ``mse_corrected_mean``, ``z_mean``, ``z_sd``, ``coverage``.
    level : float
        Interval level of the coverage (fraction).
    """

    magnitude_type: str
    window_start: str
    window_end: str
    examined: str
    active: str | None
    agreement: AgreementResult
    held_out: pd.DataFrame
    per_station: pd.DataFrame
    level: float

    def candidate_worse(self) -> tuple[bool, str]:
        """Whether the examined version agrees worse than the active one beyond split noise.

        Worse means: the mean over seeds of the paired difference of agreement SDs
        (examined − active) is larger than the SD of that difference across seeds. Without an
        active model, or with one seed, the answer is False.
        """
        if self.active is None or len(self.agreement.seeds) < 2:
            return False, ""
        d = self.agreement.column(self.examined) - self.agreement.column(self.active)
        mean, spread = float(d.mean()), float(d.std(ddof=1))
        if mean > spread:
            return True, (
                f"split-half agreement SD worse than the active model by {mean:+.4f} "
                f"(seed-to-seed spread {spread:.4f})"
            )
        return False, ""

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form; serialise with :func:`stations.strict_json.dumps`."""
        worse, reason = self.candidate_worse()
        return {
            "magnitude_type": self.magnitude_type,
            "window_start": self.window_start,
            "window_end": self.window_end,
            "examined": self.examined,
            "active": self.active,
            "split_half": {
                "n_events": self.agreement.n_events,
                "n_readings": self.agreement.n_rows,
                "seeds": list(self.agreement.seeds),
                "reference": CORRECTED_MEAN,
                "estimators": self.agreement.summary(reference=CORRECTED_MEAN),
                "per_seed": {
                    name: self.agreement.column(name).tolist() for name in self.agreement.names
                },
            },
            "held_out": self.held_out.to_dict(orient="records"),
            "per_station": self.per_station.to_dict(orient="records"),
            "level": self.level,
            "worse_than_active": worse,
            "reason": reason or None,
        }

    def render_text(self, *, max_stations: int = 15) -> str:
        """A readable summary for people."""
        ag = self.agreement
        lines = [
            f"label-free check ({self.magnitude_type})",
            f"  readings {ag.n_rows:,} of {ag.n_events:,} events"
            + (
                f" between {self.window_start[:19]} and {self.window_end[:19]}"
                if self.window_start
                else ""
            ),
            "",
            f"split-half agreement over {len(ag.seeds)} random splits "
            "(SD of the two halves' difference; smaller is better):",
            f"  {'estimator':<34} {'SD':>7} {'spread':>7} {'ratio to corrected mean':>24}",
        ]
        for row in ag.summary(reference=CORRECTED_MEAN):
            spread = row["agreement_sd_spread"]
            rs = row["ratio_spread"]
            lines.append(
                f"  {_label(row['estimator'], self):<34} {row['agreement_sd']:7.4f} "
                f"{'-' if spread is None else f'{spread:.4f}':>7} "
                f"{row['ratio']:>14.3f} ± {'-' if rs is None else f'{rs:.3f}'}"
            )
        lines += [
            "",
            "held-out station prediction (each reading predicted from the other stations):",
            f"  {'estimator':<34} {'MSE':>7} {'z SD':>6} {'coverage':>9}"
            f"  (of the {100 * self.level:.0f} % interval)",
        ]
        for r in self.held_out.to_dict(orient="records"):
            cov = r["coverage"]
            lines.append(
                f"  {_label(r['estimator'], self):<34} {r['mse']:7.4f} "
                f"{_fmt(r['z_sd'], '6.3f'):>6} {_fmt(cov, '9.3f'):>9}"
            )
        ps = self.per_station
        if len(ps):
            worst = ps.sort_values("mse", ascending=False).head(max_stations)
            lines += [
                "",
                f"stations predicted worst by {self.examined} (of {len(ps):,}; all in --json):",
                f"  {'station / epoch':<34} {'readings':>8} {'MSE':>7} {'z mean':>7} {'z SD':>6}",
            ]
            for r in worst.to_dict(orient="records"):
                lines.append(
                    f"  {r['station_id']:<34} {r['n_readings']:8,} {r['mse']:7.4f} "
                    f"{r['z_mean']:+7.3f} {_fmt(r['z_sd'], '6.3f'):>6}"
                )
        worse, reason = self.candidate_worse()
        if self.active is not None and self.active != self.examined:
            lines += ["", reason if worse else "agreement not worse than the active model"]
        return "\n".join(lines)


def _label(name: str, report: CheckReport) -> str:
    if name == report.active and name != report.examined:
        return f"{name} (active)"
    if name == report.examined and name == report.active:
        return f"{name} (active)"
    return name


def _fmt(value: Any, spec: str) -> str:
    return "-" if value is None or not np.isfinite(value) else format(float(value), spec)


def _model_rows(obs: ObservationSet, params: StationParameters) -> RowEstimator:
    """Per-row GLS inputs of a model version; NaN where it does not know the station/epoch."""
    unit = params.assign_units(obs.station_ids[obs.station], obs.event_time[obs.event])
    known = unit >= 0
    safe = np.where(known, unit, 0)
    y = np.where(known, obs.magnitude - params.bias[safe], np.nan)
    s2 = np.where(known, params.sigma2[safe], np.nan)
    pairs = params.pairs if params.pairs.n_pairs else None
    return RowEstimator("", y, s2, np.where(known, unit, -1).astype(np.int64), pairs)


def _usable_detections(obs: ObservationSet) -> ObservationSet:
    keep = obs.detected & ~obs.clipped & np.isfinite(obs.magnitude)
    return obs.subset(keep)


def check_observations(
    obs: ObservationSet,
    models: dict[str, StationParameters],
    *,
    examined: str,
    active: str | None = None,
    seeds: int = 10,
    min_stations: int = 4,
    level: float = 0.68,
    window: tuple[str, str] = ("", ""),
) -> CheckReport:
    """Score ``models`` and the station-corrected mean on ``obs`` (module docstring).

    Parameters
    ----------
    obs : ObservationSet
        Station-level readings (non-detections and clipped readings are ignored).
    models : dict of str to StationParameters
        Named model versions; ``examined`` (and ``active``, when given) must be keys.
    seeds : int, default=10
        Random splits of the split-half agreement.
    min_stations : int, default=4
        Events with fewer usable readings are not split.
    level : float, default=0.68
        Interval level of the held-out coverage.

    Raises
    ------
    InsufficientDataError
        If too few events have ``min_stations`` readings known to every model.
    """
    from fusion.model.validation import held_out_prediction

    det = _usable_detections(obs)
    estimators = []
    for name, params in models.items():
        r = _model_rows(det, params)
        estimators.append(RowEstimator(name, r.y, r.s2, r.unit, r.pairs))
    corr = station_corrections(det.event, det.station, det.magnitude, det.n_events, det.n_stations)
    ones = np.ones(det.n_obs)
    estimators.append(
        RowEstimator(CORRECTED_MEAN, det.magnitude - corr[det.station], ones, det.station)
    )
    agreement = split_half_network_agreement(
        det.event, det.n_events, estimators, seeds=seeds, min_stations=min_stations
    )
    common = np.ones(det.n_obs, dtype=bool)
    for e in estimators:
        common &= np.isfinite(e.y)
    held_rows = []
    per_station = pd.DataFrame()
    for name, params in models.items():
        unit_obs, p = _unit_view(det.subset(common), params)
        res = held_out_prediction(
            p.bias, p.sigma2, p.pairs, unit_obs, bias_var=p.bias_var, replicates=0, level=level
        )
        rows = res.rows
        held_rows.append(
            {
                "estimator": name,
                "n_readings": len(rows),
                "mse": _gls_mse(res.pooled),
                "z_sd": float(rows["z"].std(ddof=1)),
                "coverage": float(np.mean(np.abs(rows["z"]) <= _crit(level))),
            }
        )
        if name == examined:
            st = res.per_station
            per_station = pd.DataFrame(
                {
                    "station_id": st["station_id"],
                    "n_readings": st["n_obs"],
                    "mse": st["mse_gls"],
                    "mse_corrected_mean": st["mse_bias_corrected_mean"],
                    "z_mean": st["z_mean"],
                    "z_sd": st["z_sd"],
                    "coverage": st["coverage"],
                }
            )
    base = det.subset(common)
    res = held_out_prediction(corr, np.ones(det.n_stations), None, base, replicates=0, level=level)
    held_rows.append(
        {
            "estimator": CORRECTED_MEAN,
            "n_readings": len(res.rows),
            "mse": _gls_mse(res.pooled),
            "z_sd": float("nan"),
            "coverage": float("nan"),
        }
    )
    return CheckReport(
        magnitude_type=obs.magnitude_type,
        window_start=window[0],
        window_end=window[1],
        examined=examined,
        active=active,
        agreement=agreement,
        held_out=pd.DataFrame(held_rows),
        per_station=per_station,
        level=float(level),
    )


def _gls_mse(pooled: pd.DataFrame) -> float:
    """Pooled held-out MSE of the GLS prediction (magnitude units²)."""
    return float(pooled.loc[pooled["method"] == "gls", "mse"].to_numpy(dtype=float)[0])


def _crit(level: float) -> float:
    from scipy import special

    return float(special.ndtri(0.5 + level / 2.0))


def _unit_view(
    obs: ObservationSet, params: StationParameters
) -> tuple[ObservationSet, StationParameters]:
    """The readings with stations replaced by the model's units (every row must be known)."""
    unit = params.assign_units(obs.station_ids[obs.station], obs.event_time[obs.event])
    unit_obs = ObservationSet(
        magnitude_type=obs.magnitude_type,
        event_ids=obs.event_ids,
        event_time=obs.event_time,
        station_ids=np.asarray(params.unit_ids, dtype=object),
        event=obs.event,
        station=unit.astype(np.int64),
        magnitude=obs.magnitude,
        detected=obs.detected,
        clipped=obs.clipped,
        threshold=obs.threshold,
        distance_km=obs.distance_km,
    )
    return unit_obs, params


def check_models(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    *,
    magnitude_type: str | None = None,
    version: str | None = None,
    seeds: int = 10,
    days: float | None = None,
    min_stations: int = 4,
) -> CheckReport:
    """Check a version (default the newest candidate, else the active model) beside the active
    model and the station-corrected mean, on the window before the latest origin time.

    Raises
    ------
    ModelNotFoundError
        If there is no version of the type at all.
    InsufficientDataError
        If the window has too few events with ``min_stations`` readings.
    """
    from fusion.workflows.dry_run import newest_candidate
    from fusion.workflows.fusing import resolve_version
    from fusion.workflows.learning import _latest_origin, load_window

    mtype = magnitude_type or cfg.learn.magnitude_type
    active_id = registry.active_id(mtype)
    if version:
        examined = resolve_version(registry, mtype, version)
    else:
        try:
            examined = newest_candidate(registry, mtype)
        except ModelNotFoundError:
            if active_id is None:
                raise ModelNotFoundError(
                    f"no {mtype} model version to check; run 'magfuse learn' first"
                ) from None
            examined = registry.get(active_id)
    models = {examined.version_id: registry.load_parameters(examined)}
    if active_id is not None and active_id != examined.version_id:
        models[active_id] = registry.load_parameters(active_id)
    n_days = float(days if days is not None else cfg.learn.window_days)
    if n_days <= 0:
        raise InsufficientDataError(f"--days must be positive, got {n_days:g}")
    end = _latest_origin(store, mtype)
    start = end - timedelta(days=n_days)
    obs = load_window(store, mtype, start=start, end=end + timedelta(microseconds=1))
    return check_observations(
        obs,
        models,
        examined=examined.version_id,
        active=active_id,
        seeds=seeds,
        min_stations=min_stations,
        level=cfg.network.confidence_level,
        window=(start.isoformat(), end.isoformat()),
    )
