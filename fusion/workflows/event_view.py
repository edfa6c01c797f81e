"""One event explained: its network magnitude, station contributions and leave-one-out checks.

:func:`explain_event` shows what is on record: when the fused store holds the event (status
``final``, ``reviewed`` or ``preliminary``), the recorded network magnitude, its station
contributions and the model version that made it. Only when asked (``recompute=True``, or a
model version named) is the event also fused now from the stored readings, and that value is
shown beside the recorded one, labelled. An event that was never fused is fused now with the
active model (status ``not recorded``). :func:`render_event` is the text an analyst reads in a
terminal (``magfuse event``).

Conventions, the same in the text, the JSON and the event figure (docs/conventions.md):

- **influence** = network magnitude with the station minus network magnitude without it
  (M̂ − M̂^(−i)); positive means the station pulls the network magnitude up. The summary line
  names the station with the largest |influence| and gives its influence with this sign.
- **corrected** = station magnitude + station correction; for a non-detection it is the noise
  threshold + station correction (the upper bound the figure plots).
- **interval**: the normal interval at ``[network] confidence_level``, named "68 % interval"
  (for 0.68) everywhere; the standard error is called "SE".
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from fusion.advisory import ADVISORY
from fusion.network.network_magnitude import interval_name
from fusion.wording import count
from stations.errors import ConfigError, EventNotFoundError

if TYPE_CHECKING:
    import pandas as pd

    from fusion.network.network_magnitude import FusedMagnitudes, NetworkEstimate
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry
    from stations.store import StationMagnitudeStore

__all__ = [
    "CONVENTIONS",
    "NOT_RECORDED",
    "EventExplanation",
    "explain_event",
    "interval_name",
    "render_event",
]

#: Status of an event that the fused store does not hold (it was fused just now).
NOT_RECORDED = "not recorded"

#: The sign and column conventions stated in every event output (module docstring).
CONVENTIONS: dict[str, str] = {
    "influence": "network magnitude with the station minus network magnitude without it",
    "corrected": (
        "station magnitude + correction; for a non-detection, noise threshold + correction"
    ),
    "correction": "station correction = minus the station bias",
}


@dataclass(frozen=True, slots=True)
class EventExplanation:
    """An explained event with everything :func:`render_event` shows.

    Attributes
    ----------
    estimate : NetworkEstimate
        The value shown: the recorded one when the fused store holds the event.
    event_row : dict
        The event-table row of ``estimate``.
    model_version : str
        Station model that made ``estimate``.
    fused : FusedMagnitudes
        ``estimate`` as a one-event table pair.
    readings : pandas.DataFrame
        The event's stored readings (of the magnitude type).
    status : str
        ``final``, ``reviewed`` or ``preliminary`` (QuakeML EvaluationStatus of the recorded
        row), or :data:`NOT_RECORDED`.
    recomputed : NetworkEstimate, optional
        The event fused now with ``recomputed_version`` (only when asked).
    recomputed_version : str, optional
    """

    estimate: NetworkEstimate
    event_row: dict[str, Any]
    model_version: str
    fused: FusedMagnitudes
    readings: pd.DataFrame
    status: str = NOT_RECORDED
    recomputed: NetworkEstimate | None = None
    recomputed_version: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (``magfuse event --json``); flags are lists everywhere."""
        out = _estimate_dict(self.estimate)
        out["status"] = self.status
        out["model_version"] = self.model_version
        out["event"] = {
            k: (v.isoformat() if hasattr(v, "isoformat") else _plain(v))
            for k, v in self.event_row.items()
        }
        out["event"]["flags"] = list(self.estimate.flags)
        if self.recomputed is not None:
            out["recomputed"] = {
                "model_version": self.recomputed_version,
                **_estimate_dict(self.recomputed),
            }
        out["conventions"] = dict(CONVENTIONS)
        out["notes"] = (
            [_SINGLE_NOTE.split(maxsplit=1)[1]] if "single-station" in self.estimate.flags else []
        )
        out["advisory"] = ADVISORY
        return out


def _estimate_dict(est: NetworkEstimate) -> dict[str, Any]:
    """``NetworkEstimate.to_dict`` with the named interval and corrected thresholds."""
    out = est.to_dict()
    lo, hi = est.confidence_interval(est.confidence_level)
    out["interval"] = {
        "name": interval_name(est.confidence_level),
        "level": est.confidence_level,
        "low": lo,
        "high": hi,
    }
    for row, c in zip(out["contributions"], est.contributions, strict=True):
        row["corrected_threshold"] = c.threshold + c.correction if not c.detected else math.nan
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
    recompute: bool = False,
) -> EventExplanation:
    """Explain one event: the recorded value, and the value fused now only when asked.

    Parameters
    ----------
    version : str, optional
        Model version to fuse with now (implies ``recompute``); default the active one.
    recompute : bool, default=False
        Also fuse the event now from its stored readings and show that value beside the
        recorded one. Without a recorded value the event is always fused now.

    Raises
    ------
    EventNotFoundError
        If the store has no reading of that event (of that type).
    ConfigError
        If the event has several magnitude types and none was chosen.
    ModelNotFoundError
        If the event must be fused now and there is no active model of the type (and no
        version was named).
    """
    from fusion.versions.fused_store import FusedStore

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
    fused_store = FusedStore(store.root)
    recorded = fused_store.current(magnitude_type, event_ids=[event_id])
    if recorded.empty:
        fused, vid = _fuse_now(registry, cfg, frame, magnitude_type, version)
        return EventExplanation(fused.event(event_id), _row(fused), vid, fused, frame)
    rec = _recorded_fused(recorded, fused_store.contributions(magnitude_type, event_id))
    row = recorded.iloc[0]
    again: NetworkEstimate | None = None
    again_id: str | None = None
    if recompute or version is not None:
        now, again_id = _fuse_now(registry, cfg, frame, magnitude_type, version)
        again = now.event(event_id)
    return EventExplanation(
        rec.event(event_id),
        _row(rec),
        str(row["model_version"]),
        rec,
        frame,
        status=str(row["evaluation_status"]),
        recomputed=again,
        recomputed_version=again_id,
    )


def _row(fused: FusedMagnitudes) -> dict[str, Any]:
    """The event row, its largest influence taken from the station rows with their sign.

    Rows recorded before the influence was stored signed carry |influence| in the event
    table; the station rows always had the sign, so the summary is rebuilt from them.
    """
    row = {str(k): v for k, v in fused.events.iloc[0].to_dict().items()}
    station = row.get("max_influence_station")
    if station is not None and isinstance(station, str):
        c = fused.contributions
        hit = c["station_id"].astype(str).to_numpy() == station
        values = c["influence"].to_numpy(dtype=float)[hit]
        values = values[np.isfinite(values)]
        if values.shape[0]:
            row["max_influence"] = float(values[np.argmax(np.abs(values))])
    return row


def _fuse_now(
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    frame: pd.DataFrame,
    magnitude_type: str,
    version: str | None,
) -> tuple[FusedMagnitudes, str]:
    """Fuse one event's readings with a model version (the active one by default)."""
    from fusion.observations import ObservationSet
    from fusion.workflows.fusing import fuse_with_version, resolve_version

    v = resolve_version(registry, magnitude_type, version)
    obs = ObservationSet.from_frame(frame, magnitude_type=magnitude_type)
    return fuse_with_version(obs, registry, v, cfg), v.version_id


def _recorded_fused(events: pd.DataFrame, contributions: pd.DataFrame) -> FusedMagnitudes:
    """The fused store's current row of one event as a :class:`FusedMagnitudes`."""
    import pandas as pd

    from fusion.network.network_magnitude import FusedMagnitudes

    ids = pd.Index(events["event_id"].astype(str))
    rows = contributions.drop(columns=["run_id", "run_seq"], errors="ignore").copy()
    rows["event_id"] = pd.Categorical(rows["event_id"].astype(str), categories=ids)
    rows["flags"] = rows["flags"].fillna("").astype(str)
    for col in ("magnitude", "threshold", "correction", "corrected_magnitude", "weight"):
        rows[col] = pd.to_numeric(rows[col]).astype(float)
    for col in ("robust_weight", "residual", "influence", "z"):
        rows[col] = pd.to_numeric(rows[col]).astype(float)
    ev = events.reset_index(drop=True).copy()
    ev["flags"] = ev["flags"].fillna("").astype(str)
    return FusedMagnitudes(events=ev, contributions=rows.reset_index(drop=True))


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


def _value_line(est: NetworkEstimate) -> str:
    """``0.86  SE 0.101; 68 % interval 0.76 .. 0.96``."""
    level = est.confidence_level
    lo, hi = est.confidence_interval(level)
    return (
        f"{_f(est.magnitude)}  SE {_f(est.uncertainty, '.3f')}; "
        f"{interval_name(level)} {_f(lo)} .. {_f(hi)}"
    )


def _status_lines(ex: EventExplanation) -> list[str]:
    if ex.status == NOT_RECORDED:
        lines = [
            f"status             {NOT_RECORDED}: fused now with {ex.model_version} "
            "(run magfuse fuse to record it)"
        ]
    else:
        lines = [f"status             {ex.status}, recorded with model {ex.model_version}"]
    if ex.recomputed is not None:
        lines.append(
            f"recomputed now     {_value_line(ex.recomputed)} with {ex.recomputed_version} "
            "(not on record)"
        )
    return lines


_SINGLE_NOTE = (
    "single-station     one detecting station: the value rests on its reading (and the "
    "non-detections' thresholds); the interval is never narrower than that reading's own SD"
)


def render_event(ex: EventExplanation) -> str:
    """The terminal view of one event: summary lines and the station table."""
    est, ev = ex.estimate, ex.event_row
    lines = [
        f"event {est.event_id}  {est.magnitude_type}  origin {str(ev.get('origin_time'))[:23]}",
        f"network magnitude  {_value_line(est)}",
        *_status_lines(ex),
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
    ]
    if "single-station" in est.flags:
        lines.append(_SINGLE_NOTE)
    lines += [
        "",
        f"influence = {CONVENTIONS['influence']}; corrected = mag + correction "
        "(non-detection: noise threshold + correction)",
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
            corrected = c.threshold + c.correction
            lines.append(
                f"{c.station_id:<16} {'-':>5} {_f(c.correction, '+.2f'):>10} "
                f"{'< ' + _f(corrected):>9} {_f(c.weight, '.3f'):>7} {'':>8} {'':>9} "
                f"{'':>6}  not detected (noise threshold {_f(c.threshold)})"
            )
    lines += ["", ADVISORY]
    return "\n".join(lines)
