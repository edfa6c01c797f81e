"""Network magnitudes for a window of the store with a stored model version.

This is the glue between the store, the model registry and :func:`fuse_events`: the options
come from the ``[network]`` and ``[censoring]`` sections of the configuration, the parameters
from a model version (the active one by default).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING

from fusion.learning import load_window
from fusion.observations import ObservationSet

if TYPE_CHECKING:
    from config.model import MagfuseConfig
    from fusion.model_registry import ModelRegistry, ModelVersion
    from fusion.network_magnitude import FusedMagnitudes
    from fusion.parameters import StationParameters
    from stations.store import StationMagnitudeStore

__all__ = ["FusedWindow", "fuse_observations", "fuse_window", "resolve_version"]


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
    obs: ObservationSet, params: StationParameters, cfg: MagfuseConfig
) -> FusedMagnitudes:
    """:func:`fusion.network_magnitude.fuse_events` with the configured options."""
    from fusion.network_magnitude import fuse_events

    net, cens = cfg.network, cfg.censoring
    return fuse_events(
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
    params = registry.load_parameters(v)
    obs = load_window(store, magnitude_type, start=start, end=end)
    return FusedWindow(fuse_observations(obs, params, cfg), v, obs)
