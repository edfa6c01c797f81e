"""The station reliability report of a model version, from the store (``magfuse report``).

Glue between the store, the model registry and :mod:`fusion.report`: the version's learned
tables (stations, pairs, epochs), the events of the report window fused with that version,
the epicentral distance of every contribution and, when station metadata is given, station
coordinates for the map of correlated pairs.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from fusion.workflows.fusing import fuse_with_version, resolve_version
from fusion.workflows.learning import load_window

if TYPE_CHECKING:
    from fusion.report import ReportFiles
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry
    from stations.metadata import StationMetadata
    from stations.store import StationMagnitudeStore

__all__ = ["station_coordinates", "write_model_report"]


def station_coordinates(metadata: StationMetadata) -> pd.DataFrame:
    """station_id, latitude, longitude of each station's latest epoch."""
    e = metadata.epochs.sort_values("start")
    last = e.groupby("station_id", as_index=False).tail(1)
    return last.loc[:, ["station_id", "latitude", "longitude"]].reset_index(drop=True)


def write_model_report(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    out_dir: Path,
    *,
    magnitude_type: str | None = None,
    version: str | None = None,
    since: datetime | None = None,
    metadata: StationMetadata | None = None,
) -> ReportFiles:
    """Write the station table and the HTML report of a model version.

    Parameters
    ----------
    since : datetime, optional
        Start of the event window shown (UTC); default the model's own window.
    metadata : StationMetadata, optional
        Station coordinates for the pair map.
    """
    from fusion.report import ReportInputs, write_station_report

    mtype = magnitude_type or cfg.learn.magnitude_type
    v = resolve_version(registry, mtype, version)
    meta = dict(v.meta)
    end = datetime.fromisoformat(str(meta["window_end"]))
    start = since
    if start is None and meta.get("window_start"):
        start = datetime.fromisoformat(str(meta["window_start"]))
    obs = load_window(store, mtype, start=start, end=end + timedelta(microseconds=1))
    fused = fuse_with_version(obs, registry, v, cfg)
    inputs = ReportInputs(
        model_meta=meta,
        stations=registry.load_table(v, "stations"),
        pairs=registry.load_table(v, "pairs"),
        epochs=registry.load_table(v, "epochs"),
        events=fused.events,
        contributions=fused.contributions.assign(distance_km=obs.distance_km),
        coordinates=station_coordinates(metadata) if metadata is not None else None,
    )
    return write_station_report(
        inputs,
        out_dir,
        since=since,
        level=cfg.network.confidence_level,
        outlier_weight=cfg.network.outlier_weight,
    )
