"""From the store to a candidate model version: window, fit, record (``magfuse learn``).

:func:`learn_candidate` reads the rolling window of one magnitude type from the store, fits a
:class:`~fusion.model.station_model.StationModel` warm-started from the active model (anchor
continuity, docs/rolling-fit.md §4), and saves the result as a new, not yet adopted, model version
with everything needed to reproduce and audit it: window, as-of time, configuration hash, data
fingerprint of the store files read, code version, creation time and anchor.

**Unchanged input stores nothing.** The inputs of a fit (window, configuration hash, data
fingerprint, forgetting settings, seed, code version and the previous model that gives the
warm start and the anchor) are hashed into ``input_digest``. A stored version of the same type
with the same digest is the answer, without fitting again. A new fit whose parameters agree
with a stored version's of the same data and settings (same units and pairs; biases, variances
and pair covariances within :data:`IDENTICAL_ATOL`) is not stored either: the outcome names
the version it is identical to.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from fusion.observations import ObservationSet
from stations.errors import ConfigError, InsufficientDataError, ModelNotFoundError

if TYPE_CHECKING:
    from fusion.model.parameters import StationParameters
    from fusion.model.station_model import StationModel
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry, ModelVersion
    from stations.store import StationMagnitudeStore

__all__ = [
    "IDENTICAL_ATOL",
    "LearnOutcome",
    "check_reference_stations",
    "config_hash",
    "learn_candidate",
    "load_window",
    "model_summary",
]

#: Largest difference (magnitude units, and their squares for variances) under which two fits
#: of the same data and settings count as identical. Far below the printed precision (0.001)
#: and the adoption limits; common practice, no source.
IDENTICAL_ATOL = 1e-6

#: Meta keys that must agree before two versions' parameters are compared.
_SAME_INPUT_KEYS = (
    "window_start",
    "window_end",
    "half_life_days",
    "window_days",
    "config_hash",
    "data_fingerprint",
)


@dataclass(frozen=True, slots=True)
class LearnOutcome:
    """A learned candidate: the stored version and the fitted model behind it.

    Attributes
    ----------
    version : ModelVersion
        The new version, or the stored one the result is identical to.
    model, observations
        The fit and its data; None when a stored version with the same inputs was reused
        without fitting.
    identical_to : str or None
        Set when nothing new was stored: the id of the identical stored version.
    """

    version: ModelVersion
    model: StationModel | None
    observations: ObservationSet | None
    identical_to: str | None = None


def config_hash(cfg: MagfuseConfig) -> str:
    """SHA-256 (first 16 hex digits) of the validated configuration, for model provenance."""
    return hashlib.sha256(cfg.model_dump_json().encode()).hexdigest()[:16]


def _latest_origin(store: StationMagnitudeStore, magnitude_type: str) -> datetime:
    summary = store.summary()
    for t in summary.by_type:
        if t.magnitude_type == magnitude_type and t.last_origin_time is not None:
            last: datetime = t.last_origin_time
            return last if last.tzinfo else last.replace(tzinfo=UTC)
    raise InsufficientDataError(
        f"the store holds no {magnitude_type} station magnitudes; ingest some first "
        "('magfuse ingest FILE') or choose another --type"
    )


def load_window(
    store: StationMagnitudeStore,
    magnitude_type: str,
    *,
    start: datetime | None,
    end: datetime | None,
) -> ObservationSet:
    """Current station magnitudes (and non-detections) of one type in [start, end).

    Raises
    ------
    InsufficientDataError
        If the window holds no rows of that type.
    """
    frame = store.scan(magnitude_type=magnitude_type, start=start, end=end)
    if frame.empty:
        raise InsufficientDataError(
            f"no {magnitude_type} station magnitudes between {start or 'the start'} and "
            f"{end or 'the end'}; check --type and the window"
        )
    return ObservationSet.from_frame(frame, magnitude_type=magnitude_type)


def check_reference_stations(
    reference: tuple[str, ...] | list[str], known: Any, magnitude_type: str
) -> None:
    """Raise unless every ``[learn] reference_stations`` id has data in the learning window.

    An unknown id would silently leave the anchor without those stations (units
    uncalibrated, calibration uncertainty NaN), so it is an error at learn time.

    Raises
    ------
    ConfigError
        Naming the unknown ids and the station ids that are known.
    """
    if not reference:
        return
    have = {str(s) for s in np.asarray(known).astype(str)}
    unknown = [r for r in reference if r not in have]
    if not unknown:
        return
    listed = sorted(have)
    shown = ", ".join(listed[:60]) + (f", ... ({len(listed)} in all)" if len(listed) > 60 else "")
    raise ConfigError(
        f"[learn] reference_stations names {', '.join(repr(u) for u in unknown)}, with no "
        f"{magnitude_type} station magnitudes in the learning window; known stations: "
        f"{shown or 'none'}. Fix the ids (NET.STA.LOC) or widen the window"
    )


def learn_candidate(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    *,
    magnitude_type: str | None = None,
    as_of: datetime | None = None,
    half_life_days: float | None = None,
    window_days: float | None = None,
    random_state: int | None = 0,
    now: datetime | None = None,
) -> LearnOutcome:
    """Fit the station model on the rolling window and save it as a candidate version.

    Parameters
    ----------
    store, registry
        Where the data and the model versions live.
    cfg : MagfuseConfig
        ``[learn]``, ``[pairs]`` and ``[epochs]`` give the estimator's parameters.
    magnitude_type : str, optional
        Default ``[learn] magnitude_type``.
    as_of : datetime, optional
        End of the window and reference time of the forgetting weights (UTC). Default: the
        latest origin time of that type in the store, which is "now" for a network that
        ingests every day.
    half_life_days, window_days : float, optional
        Override ``[learn]``.
    random_state : int, optional
        Seed of the global test's bootstrap (the version records it).

    Returns
    -------
    LearnOutcome
        The stored version (not adopted) and the fitted model.
    """
    from fusion.model.station_model import StationModel

    mtype = magnitude_type or cfg.learn.magnitude_type
    end = as_of.astimezone(UTC) if as_of is not None else _latest_origin(store, mtype)
    window = float(window_days if window_days is not None else cfg.learn.window_days)
    half_life = float(half_life_days if half_life_days is not None else cfg.learn.half_life_days)
    start = end - timedelta(days=window) if math.isfinite(window) else None
    previous_id = registry.active_id(mtype)
    inputs: dict[str, Any] = {
        "window_start": start.isoformat() if start else None,
        "window_end": end.isoformat(),
        "half_life_days": half_life,
        "window_days": window,
        "config_hash": config_hash(cfg),
        # the window's files, the as-of instant included (the scan below reads it too)
        "data_fingerprint": store.fingerprint(
            magnitude_type=mtype, start=start, end=end + timedelta(microseconds=1)
        ),
        "previous_version": previous_id,
        "random_state": random_state,
    }
    digest = input_digest(inputs)
    same = next((v for v in registry.versions(mtype) if v.meta.get("input_digest") == digest), None)
    if same is not None:
        return LearnOutcome(same, None, None, identical_to=same.version_id)
    # The scan's end is exclusive; the as-of instant itself belongs to the window.
    obs = load_window(store, mtype, start=start, end=end + timedelta(microseconds=1))
    check_reference_stations(cfg.learn.reference_stations, obs.station_ids, mtype)

    previous = None
    if previous_id is not None:
        try:
            previous = registry.load_parameters(previous_id)
        except ModelNotFoundError:
            previous = None
    model = StationModel.from_config(
        cfg.learn, cfg.pairs, cfg.epochs, random_state=random_state, censoring=cfg.censoring
    )
    model.set_params(half_life_days=half_life, window_days=window)
    as_of64 = np.datetime64(end.replace(tzinfo=None), "us")
    model.fit(obs, as_of=as_of64, previous=previous)

    meta: dict[str, Any] = {
        **inputs,
        "as_of": end.isoformat(),
        "input_digest": digest,
        "anchor": _anchor_meta(model),
        **model_summary(model, obs),
    }
    twin = _identical_version(registry, model.parameters_, meta)
    if twin is not None:
        return LearnOutcome(twin, model, obs, identical_to=twin.version_id)
    tables = {
        "stations": model.station_table_,
        "pairs": _parquet_safe(model.pair_table_),
        "epochs": _parquet_safe(model.epoch_table_),
    }
    curves = model.nondetections_.curves
    if (
        curves is not None
    ):  # estimated thresholds or the safe-cell fallback (fusion.model.thresholds)
        tables["detection_curves"] = curves.table()
    version = registry.save(model.parameters_, meta, tables, now=now)
    return LearnOutcome(version, model, obs)


def input_digest(inputs: dict[str, Any]) -> str:
    """SHA-256 of a fit's inputs (module docstring), with the code version."""
    from fusion import __version__

    text = json.dumps({**inputs, "code_version": __version__}, sort_keys=True, default=str)
    return f"sha256:{hashlib.sha256(text.encode()).hexdigest()}"


def _identical_version(
    registry: ModelRegistry, params: StationParameters, meta: dict[str, Any]
) -> ModelVersion | None:
    """A stored version of the same data and settings whose parameters equal ``params``."""
    for v in reversed(registry.versions(params.magnitude_type)):
        if any(v.meta.get(k) != meta.get(k) for k in _SAME_INPUT_KEYS):
            continue
        if _same_parameters(registry.load_parameters(v), params):
            return v
    return None


def _same_parameters(a: StationParameters, b: StationParameters) -> bool:
    """Same units and pairs, values within :data:`IDENTICAL_ATOL`."""
    if not np.array_equal(a.unit_ids.astype(str), b.unit_ids.astype(str)):
        return False
    pairs_a = np.stack([a.pairs.k, a.pairs.l]) if a.pairs.n_pairs else np.zeros((2, 0))
    pairs_b = np.stack([b.pairs.k, b.pairs.l]) if b.pairs.n_pairs else np.zeros((2, 0))
    if not np.array_equal(pairs_a, pairs_b):
        return False
    pa_, pb_ = (np.concatenate([p.bias, p.bias_var, p.sigma2, p.pairs.c]) for p in (a, b))
    return bool(np.allclose(pa_, pb_, rtol=0.0, atol=IDENTICAL_ATOL, equal_nan=True))


def _anchor_meta(model: StationModel) -> dict[str, Any]:
    a = model.anchor_
    return {
        "kind": str(a.kind),
        "value": float(a.value),
        "se": float(a.se),
        "n_reference": int(a.n_reference),
        "continuity": bool(a.continuity),
    }


def _parquet_safe(frame: pd.DataFrame) -> pd.DataFrame:
    """Typed columns for Parquet: object columns get their inferred type (bool, float,
    time), and those that still mix types (or are all missing) become strings."""
    out = frame.infer_objects()
    for col in out.columns:
        if out[col].dtype == object:
            out[col] = out[col].astype("string")
    return out


def model_summary(model: StationModel, obs: ObservationSet) -> dict[str, Any]:
    """Counts and diagnostics of a fitted model, for the version metadata and the CLI."""
    table = model.station_table_
    gt = model.global_test_
    pairs = model.pair_table_
    flagged = int(pairs["flagged"].sum()) if "flagged" in pairs and len(pairs) else 0
    detected = int(obs.detected.sum())
    with_threshold = int(np.count_nonzero(~obs.detected & np.isfinite(obs.threshold)))
    nondet = getattr(model, "nondetections_", None)
    return {
        "n_events": int(np.unique(obs.event[obs.detected]).shape[0]),
        "n_readings": detected,
        "n_nondetections": int(obs.n_obs - detected),
        "n_nondetections_with_threshold": with_threshold,
        "n_clipped": int(np.count_nonzero(obs.detected & obs.clipped)),
        "nondetections": None if nondet is None else nondet.summary(),
        "n_units": len(table),
        "n_stations": int(table["station_id"].nunique()),
        "n_prior_dominated": int(table["prior_dominated"].sum()),
        "n_uncalibrated": int(table["uncalibrated"].sum()),
        "n_pairs_tested": len(pairs),
        "n_pairs_flagged": flagged,
        "n_epoch_splits": len(model.epoch_table_),
        "n_iter": int(model.n_iter_),
        "converged": bool(model.converged_),
        "global_test": None
        if gt is None
        else {
            "statistic": float(gt.statistic),
            "p_value": float(gt.p_value),
            "replicates": int(gt.replicates),
            "method": str(gt.method),
        },
    }
