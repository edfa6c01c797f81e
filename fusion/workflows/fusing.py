"""Network magnitudes for a window of the store with a stored model version.

This is the glue between the store, the model registry and :func:`fuse_events`: the options
come from the ``[network]`` and ``[censoring]`` sections of the configuration, the parameters
from a model version (the active one by default).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING

from fusion.observations import ObservationSet
from fusion.workflows.learning import load_window

if TYPE_CHECKING:
    from fusion.model.parameters import StationParameters
    from fusion.model.thresholds import DetectionCurves
    from fusion.network.network_magnitude import FusedMagnitudes
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry, ModelVersion
    from stations.store import StationMagnitudeStore

__all__ = [
    "FusedWindow",
    "fuse_observations",
    "fuse_window",
    "fuse_with_version",
    "resolve_version",
]


@dataclass(frozen=True, slots=True)
class FusedWindow:
    """Fused magnitudes of a window and the model version that made them."""

    fused: FusedMagnitudes
    version: ModelVersion
    observations: ObservationSet


def resolve_version(
    registry: ModelRegistry, magnitude_type: str, version: str | None
) -> ModelVersion:
    """The named version, or the active one of ``magnitude_type``."""
    v = registry.get(version) if version else registry.active(magnitude_type)
    if v.magnitude_type != magnitude_type:
        from stations.errors import ConfigError

        raise ConfigError(
            f"model {v.version_id} is for {v.magnitude_type}, not {magnitude_type}; "
            f"pass --type {v.magnitude_type} or a {magnitude_type} version"
        )
    return v


def fuse_observations(
    obs: ObservationSet,
    params: StationParameters,
    cfg: MagfuseConfig,
    *,
    curves: DetectionCurves | None = None,
    flag_detection: bool = False,
) -> FusedMagnitudes:
    """:func:`fusion.network.network_magnitude.fuse_events` with the configured options.

    Parameters
    ----------
    curves : DetectionCurves, optional
        The model's per-station detection curves (:mod:`fusion.model.thresholds`); non-detections
        without a stored threshold get the estimated one before fusing.
    flag_detection : bool, default=False
        Add the expected detection bias and the ``likely-biased-high`` flag to events fused
        without non-detections (the model used the safe-cell fallback: no thresholds).
    """
    from fusion.network.network_magnitude import fuse_events

    net, cens = cfg.network, cfg.censoring
    if curves is not None and cens.enabled:
        from fusion.model.thresholds import impute_thresholds

        obs, _ = impute_thresholds(obs, curves.reindex(obs.station_ids))
    fused = fuse_events(
        obs,
        params,
        confidence_level=net.confidence_level,
        robust_min_stations=net.robust_min_stations,
        nu=cfg.learn.student_t_dof,
        inconsistent_z=net.inconsistent_z,
        outlier_weight=net.outlier_weight,
        use_nondetections=cens.enabled,
        soft_threshold_sd=cens.soft_threshold_sd,
        min_detection_probability=cens.min_detection_probability,
    )
    if flag_detection and curves is not None:
        from fusion.model.thresholds import flag_detection_bias

        fused = flag_detection_bias(fused, obs, params, curves.reindex(obs.station_ids))
    return fused


def fuse_with_version(
    obs: ObservationSet, registry: ModelRegistry, version: ModelVersion, cfg: MagfuseConfig
) -> FusedMagnitudes:
    """Fuse with a stored version: its parameters and, when it has them, its detection curves
    (thresholds for non-detections that lack one; the likely-biased-high flag when the model
    fell back to safe cells)."""
    from stations.errors import ModelNotFoundError

    curves = None
    try:
        table = registry.load_table(version, "detection_curves")
    except ModelNotFoundError:
        table = None
    if table is not None and len(table):
        from fusion.model.thresholds import DetectionCurves

        curves = DetectionCurves.from_table(table)
    mode = ((version.meta.get("nondetections") or {}).get("mode")) or ""
    return fuse_observations(
        obs,
        registry.load_parameters(version),
        cfg,
        curves=curves,
        flag_detection=mode == "safe-cells",
    )


def fuse_window(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    *,
    magnitude_type: str,
    start: datetime | None = None,
    end: datetime | None = None,
    version: str | None = None,
) -> FusedWindow:
    """Fuse every event of one type in [start, end) with a model version (default active).

    Raises
    ------
    ModelNotFoundError
        If there is no active model (or the named version does not exist).
    InsufficientDataError
        If the window holds no rows of that type.
    """
    v = resolve_version(registry, magnitude_type, version)
    obs = load_window(store, magnitude_type, start=start, end=end)
    return FusedWindow(fuse_with_version(obs, registry, v, cfg), v, obs)
