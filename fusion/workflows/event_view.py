"""One event explained: its network magnitude, station contributions and leave-one-out checks.

:func:`explain_event` reads one event's readings from the store (an indexed look-up), fuses it
with a model version (the active one by default) and returns the
:class:`~fusion.network.network_magnitude.NetworkEstimate` with the event's row of the event table.
:func:`render_event` is the text an analyst reads in a terminal (``magfuse event``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from fusion.advisory import ADVISORY
from fusion.wording import count
from stations.errors import ConfigError, EventNotFoundError

if TYPE_CHECKING:
    import pandas as pd

    from fusion.network.network_magnitude import FusedMagnitudes, NetworkEstimate
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry
    from stations.store import StationMagnitudeStore

__all__ = ["EventExplanation", "explain_event", "render_event"]


@dataclass(frozen=True, slots=True)
class EventExplanation:
    """A fused event with everything :func:`render_event` shows."""

    estimate: NetworkEstimate
    event_row: dict[str, Any]
    model_version: str
    fused: FusedMagnitudes
    readings: pd.DataFrame

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (``magfuse event --json``)."""
        out = self.estimate.to_dict()
        out["model_version"] = self.model_version
        out["event"] = {
            k: (v.isoformat() if hasattr(v, "isoformat") else _plain(v))
            for k, v in self.event_row.items()
        }
        out["advisory"] = ADVISORY
        return out


def _plain(value: Any) -> Any:
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def explain_event(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    event_id: str,
    *,
    magnitude_type: str | None = None,
    version: str | None = None,
) -> EventExplanation:
    """Fuse one event and explain it.

    Raises
    ------
    EventNotFoundError
        If the store has no reading of that event (of that type).
    ConfigError
        If the event has several magnitude types and none was chosen.
    ModelNotFoundError
        If there is no active model of the type (and no version was named).
    """
    from fusion.observations import ObservationSet
    from fusion.workflows.fusing import fuse_with_version, resolve_version

    frame = store.event(event_id, magnitude_type=magnitude_type)
    if frame.empty:
        what = f"{magnitude_type} readings" if magnitude_type else "readings"
        raise EventNotFoundError(
            f"event {event_id!r} has no {what} in the store; check the id "
            "(magfuse store lists what is there) or the --type"
        )
    types = sorted(frame["magnitude_type"].astype(str).unique())
    if magnitude_type is None:
        if len(types) == 1:
            magnitude_type = types[0]
        elif cfg.learn.magnitude_type in types:
            magnitude_type = cfg.learn.magnitude_type
        else:
            raise ConfigError(
                f"event {event_id!r} has {', '.join(types)} readings; choose one with --type"
            )
        frame = frame[frame["magnitude_type"] == magnitude_type]
    v = resolve_version(registry, magnitude_type, version)
    obs = ObservationSet.from_frame(frame, magnitude_type=magnitude_type)
    fused = fuse_with_version(obs, registry, v, cfg)
    row = {str(k): v for k, v in fused.events.iloc[0].to_dict().items()}
    return EventExplanation(fused.event(event_id), row, v.version_id, fused, frame)


def _f(value: Any, fmt: str = ".2f") -> str:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "-"
    return "-" if not math.isfinite(x) else format(x, fmt)


def _detection_bias_note(ev: dict[str, Any]) -> str:
    """``; expected detection bias +x.xx`` when the event table carries it (model.thresholds)."""
    try:
        size = float(ev.get("expected_detection_bias", float("nan")))
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(size) or size <= 0.0:
        return ""
    return f"; expected detection bias {size:+.2f} (detections only)"


def render_event(ex: EventExplanation) -> str:
    """The terminal view of one event: summary lines and the station table."""
    est, ev = ex.estimate, ex.event_row
    level = est.confidence_level
    lo, hi = est.confidence_interval(level)
    lines = [
        f"event {est.event_id}  {est.magnitude_type}  origin {str(ev.get('origin_time'))[:23]}",
        f"network magnitude  {_f(est.magnitude)} ± {_f(est.uncertainty, '.3f')} (1 SE); "
        f"{round(level * 100)} % interval {_f(lo)} .. {_f(hi)}",
        f"plain mean         {_f(est.plain_mean)}  "
        f"(fused − mean {_f(ev.get('minus_plain_mean'), '+.3f')});  median {_f(est.median)}",
        f"stations           {est.n_stations} detecting, n_eff {_f(ev.get('n_eff'), '.1f')}; "
        f"Birge ratio {_f(ev.get('birge_ratio'))}; "
        f"largest influence {_f(ev.get('max_influence'), '+.3f')} "
        f"({ev.get('max_influence_station') or '-'})",
        f"method             {est.method}"
        + (
            f", {count(int(ev.get('n_nondetections_used', 0)), 'non-detection')} used, "
            f"shift {_f(ev.get('censoring_shift'), '+.3f')}"
            if ev.get("n_nondetections_used") or est.method == "censored-likelihood"
            else ""
        ),
        f"flags              {', '.join(est.flags) or '-'}" + _detection_bias_note(ev),
        f"model              {ex.model_version}",
        "",
        f"{'station':<16} {'mag':>5} {'correction':>10} {'corrected':>9} {'weight':>7} "
        f"{'residual':>8} {'influence':>9} {'z':>6}  flags",
    ]
    rows = sorted(est.contributions, key=lambda c: (not c.detected, -abs(c.weight)))
    for c in rows:
        if c.detected:
            lines.append(
                f"{c.station_id:<16} {_f(c.magnitude):>5} {_f(c.correction, '+.2f'):>10} "
                f"{_f(c.corrected_magnitude):>9} {_f(c.weight, '.3f'):>7} "
                f"{_f(c.residual, '+.3f'):>8} {_f(c.influence, '+.3f'):>9} {_f(c.z, '+.2f'):>6}  "
                f"{', '.join(c.flags)}"
            )
        else:
            lines.append(
                f"{c.station_id:<16} {'-':>5} {_f(c.correction, '+.2f'):>10} "
                f"{'< ' + _f(c.threshold):>9} {_f(c.weight, '.3f'):>7} {'':>8} {'':>9} "
                f"{'':>6}  not detected (noise threshold {_f(c.threshold)})"
            )
    lines += ["", ADVISORY]
    return "\n".join(lines)
