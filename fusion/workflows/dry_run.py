"""Dry run: what adopting a candidate model would change, before it is adopted (``magfuse diff``).

Nothing is written. The recent events (the last ``days`` before the latest origin time of the
type) are fused twice from the same stored readings, once with the active model ("before";
the plain mean when no model is active yet) and once with the candidate ("after"), and the
two are compared:

- per station: weight share before and after (the mean of the station's normalised GLS weight
  over the recent events, counting 0 where it did not contribute, so shares sum to 1 over
  stations), bias and error-SD changes of the station's current epoch, and flags that appear
  or disappear (correlated partner, new epoch, prior-dominated, uncalibrated);
- per event: the distribution of magnitude changes and the ``top`` events that move most,
  each with the stations whose weights moved most in it (the reason);
- the use of non-detections before and after (:func:`censoring_summary`): how many events
  were re-estimated with them (docs/censoring.md), how many non-detections they used, and the
  distribution of the shift censored − GLS magnitude; events left uncorrected or flagged
  likely biased high.

:meth:`DryRunReport.within_policy` checks the adoption limits of the ``[nightly]`` section.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import timedelta
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from fusion.network.summaries import censoring_summary
from fusion.wording import count
from fusion.workflows.fusing import fuse_with_version, resolve_version
from fusion.workflows.learning import _latest_origin, load_window
from stations.errors import ModelNotFoundError

if TYPE_CHECKING:
    from fusion.network.network_magnitude import FusedMagnitudes
    from fusion.settings import MagfuseConfig
    from fusion.versions.model_registry import ModelRegistry, ModelVersion
    from stations.store import StationMagnitudeStore

__all__ = [
    "DryRunReport",
    "censoring_summary",
    "dry_run",
    "newer_candidate",
    "newest_candidate",
    "no_candidate_message",
]

#: Quantiles of the magnitude changes reported.
_QUANTILES = (0.0, 0.05, 0.25, 0.5, 0.75, 0.95, 1.0)


@dataclass(frozen=True, slots=True)
class DryRunReport:
    """The comparison of a candidate model with the active one (see module docstring).

    Attributes
    ----------
    magnitude_type : str
    active_version, candidate_version : str or None
        ``active_version`` is None when no model is active (the "before" is the plain mean).
    window_start, window_end : str
        The recent events compared (ISO 8601, UTC).
    n_events : int
    stations : DataFrame
        station_id, share_before, share_after, share_change, bias_before, bias_after,
        bias_change, sigma_before, sigma_after, sigma_change, flags_before, flags_after,
        flags_added, flags_removed (magnitude units; shares are fractions) and outside_policy;
        stations outside the adoption policy first, then by |share_change|
        (:func:`order_by_policy`).
    changes : dict
        n, mean, rms, max_abs and quantiles of M̂_after − M̂_before (magnitude units).
    top_events : DataFrame
        event_id, origin_time, before, after, change, reason.
    censoring : dict
        ``{"before": ..., "after": ...}``, each a :func:`censoring_summary` (``before`` is
        None without an active model).
    """

    magnitude_type: str
    active_version: str | None
    candidate_version: str
    window_start: str
    window_end: str
    n_events: int
    stations: pd.DataFrame
    changes: dict[str, Any]
    top_events: pd.DataFrame
    policy: dict[str, float] = field(default_factory=dict)
    censoring: dict[str, Any] = field(default_factory=dict)
    agreement: dict[str, Any] | None = None

    def within_policy(
        self, *, max_weight_share_change: float, max_bias_change: float
    ) -> tuple[bool, list[str]]:
        """Whether adoption stays within the limits; the reasons when it does not."""
        reasons: list[str] = []
        s = self.stations
        if len(s):
            worst = s.iloc[int(np.argmax(s["share_change"].abs().to_numpy()))]
            if abs(worst["share_change"]) > max_weight_share_change:
                reasons.append(
                    f"weight share of {worst['station_id']} moves by "
                    f"{worst['share_change']:+.3f} (limit {max_weight_share_change:g})"
                )
            bias = s["bias_change"].abs().to_numpy(float)
            if np.isfinite(bias).any():
                worst_b = s.iloc[int(np.nanargmax(bias))]
                if abs(worst_b["bias_change"]) > max_bias_change:
                    reasons.append(
                        f"bias of {worst_b['station_id']} moves by "
                        f"{worst_b['bias_change']:+.3f} (limit {max_bias_change:g})"
                    )
        if self.agreement and self.agreement.get("worse_than_active"):
            reasons.append(str(self.agreement["reason"]))
        return (not reasons, reasons)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (``magfuse diff --json``)."""

        def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
            out = frame.astype(object).where(frame.notna(), None)
            rows = [
                {str(k): (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in r.items()}
                for r in out.to_dict(orient="records")
            ]
            for r in rows:  # flags are lists in every JSON magfuse writes
                for k in ("flags_before", "flags_after", "flags_added", "flags_removed"):
                    if k in r:
                        r[k] = sorted(_flags(str(r[k] or "")))
            return rows

        return {
            "magnitude_type": self.magnitude_type,
            "active_version": self.active_version,
            "candidate_version": self.candidate_version,
            "window_start": self.window_start,
            "window_end": self.window_end,
            "n_events": self.n_events,
            "changes": self.changes,
            "stations": records(self.stations),
            "top_events": records(self.top_events),
            "censoring": self.censoring,
            "policy": self.policy,
            "agreement": self.agreement,
        }

    def render_text(self, *, max_stations: int = 25) -> str:
        """A readable terminal summary for people."""
        c = self.changes
        before = self.active_version or "plain mean (no active model)"
        lines = [
            f"dry run ({self.magnitude_type}): nothing is written",
            f"  before  {before}",
            f"  after   {self.candidate_version}",
            f"  events  {self.n_events:,} between {self.window_start[:19]} and "
            f"{self.window_end[:19]}",
            "",
            "magnitude change after - before:",
            f"  mean {c.get('mean', float('nan')):+.3f}  rms {c.get('rms', float('nan')):.3f}  "
            f"largest |change| {c.get('max_abs', float('nan')):.3f}",
            "  quantiles "
            + "  ".join(
                f"{round(float(q) * 100)}%: {v:+.3f}" for q, v in c.get("quantiles", {}).items()
            ),
            "",
        ]
        s = self.stations.head(max_stations)  # policy breakers first (order_by_policy)
        lines.append(
            f"{'station':<14} {'share':>6} {'->':>2} {'share':<6} {'d share':>8} "
            f"{'d bias':>7} {'d sigma':>8}  flags"
        )
        for r in s.to_dict(orient="records"):
            flags = ["OUTSIDE POLICY"] if r.get("outside_policy") else []
            if r["flags_added"]:
                flags.append("+" + ",+".join(str(r["flags_added"]).split(";")))
            if r["flags_removed"]:
                flags.append("-" + ",-".join(str(r["flags_removed"]).split(";")))
            lines.append(
                f"{r['station_id']:<14} {r['share_before']:6.3f} -> {r['share_after']:<6.3f} "
                f"{r['share_change']:+8.3f} {_num(r['bias_change']):>7} "
                f"{_num(r['sigma_change']):>8}  " + " ".join(flags)
            )
        if len(self.stations) > max_stations:
            more = count(len(self.stations) - max_stations, "more station")
            lines.append(f"... {more} (--json)")
        lines += _censoring_lines(self.censoring)
        lines += _agreement_lines(self.agreement)
        if len(self.top_events):
            lines += ["", "events that would move most:"]
            for e in self.top_events.to_dict(orient="records"):
                lines.append(
                    f"  {e['event_id']:<22} {e['before']:6.2f} -> {e['after']:6.2f} "
                    f"({e['change']:+.3f})  {e['reason']}"
                )
        return "\n".join(lines)


def _censoring_lines(cens: dict[str, Any]) -> list[str]:
    """Text lines of the non-detection summary (before and after)."""
    after = cens.get("after")
    if not after:
        return []
    lines = ["", "non-detections (censored likelihood, docs/censoring.md):"]
    for label in ("before", "after"):
        c = cens.get(label)
        if not c:
            continue
        text = (
            f"  {label:<7} {c['n_used']:,} of {count(c['n_events'], 'event')} used "
            f"{count(c['n_nondetections'], 'non-detection')}"
        )
        sh = c["shift"]
        if "median" in sh:
            q = sh["quantiles"]
            text += (
                f"; shift censored - GLS median {sh['median']:+.3f}, 90 % within "
                f"[{q['0.05']:+.3f}, {q['0.95']:+.3f}], {sh['n_ge_0_1']:,} moved by 0.1 or more"
            )
        if c["n_uncorrected"]:
            text += f"; {c['n_uncorrected']:,} censoring-uncorrected"
        if c["n_likely_biased_high"]:
            text += f"; {c['n_likely_biased_high']:,} likely-biased-high"
        lines.append(text)
    return lines


def _agreement_lines(agreement: dict[str, Any] | None) -> list[str]:
    """Text lines of the label-free split-half check (:mod:`fusion.workflows.checking`)."""
    if not agreement:
        return []
    sh = agreement["split_half"]
    lines = [
        "",
        f"split-half agreement on {sh['n_events']:,} events, {len(sh['seeds'])} random splits "
        "(SD of the halves' difference; smaller is better):",
    ]
    for e in sh["estimators"]:
        spread = e["agreement_sd_spread"]
        lines.append(
            f"  {e['estimator']:<34} {e['agreement_sd']:.4f}"
            + (f" ± {spread:.4f}" if spread is not None else "")
            + f"  ({e['ratio']:.3f} of the station-corrected mean)"
        )
    return lines


def _agreement(
    obs: Any, registry: ModelRegistry, cand: ModelVersion, active: ModelVersion | None
) -> dict[str, Any] | None:
    """The label-free check of the candidate beside the active model on the dry-run events;
    None when the window has too few events with four stations."""
    from fusion.workflows.checking import check_observations
    from stations.errors import InsufficientDataError

    models = {cand.version_id: registry.load_parameters(cand)}
    if active is not None:
        models[active.version_id] = registry.load_parameters(active)
    try:
        rep = check_observations(
            obs,
            models,
            examined=cand.version_id,
            active=active.version_id if active is not None else None,
            seeds=_AGREEMENT_SEEDS,
        )
    except InsufficientDataError:
        return None
    d = rep.to_dict()
    return {k: d[k] for k in ("split_half", "worse_than_active", "reason")}


#: Random splits of the split-half check in the dry run.
_AGREEMENT_SEEDS = 5


def _num(value: Any) -> str:
    return "-" if value is None or not np.isfinite(value) else f"{float(value):+.3f}"


def _flags(text: str) -> set[str]:
    return set(text.split(";")) - {""}


def newer_candidate(registry: ModelRegistry, magnitude_type: str) -> ModelVersion | None:
    """The newest version created after the active one (any version if none is active).

    Returns None when every stored version is the active one or older than it: an older,
    superseded version is never what "the candidate" means.
    """
    active_id = registry.active_id(magnitude_type)
    versions = registry.versions(magnitude_type)
    if active_id is not None:
        active = registry.get(active_id)
        versions = [v for v in versions if v.version_id != active_id and v.created > active.created]
    return versions[-1] if versions else None


def no_candidate_message(registry: ModelRegistry, magnitude_type: str) -> str:
    """What ``magfuse diff`` says when :func:`newer_candidate` finds nothing."""
    active_id = registry.active_id(magnitude_type)
    if active_id is None:
        return f"no {magnitude_type} model version to compare; run 'magfuse learn'"
    return (
        f"no candidate newer than the active version {active_id}; run 'magfuse learn' "
        "(or name an older version: magfuse diff VERSION)"
    )


def newest_candidate(registry: ModelRegistry, magnitude_type: str) -> ModelVersion:
    """:func:`newer_candidate`, or :class:`ModelNotFoundError` when there is none."""
    cand = newer_candidate(registry, magnitude_type)
    if cand is None:
        raise ModelNotFoundError(no_candidate_message(registry, magnitude_type))
    return cand


def _station_state(registry: ModelRegistry, version: ModelVersion | None) -> pd.DataFrame:
    """Per station (current epoch): bias, sigma and flags, from a version's station table."""
    cols = ["station_id", "bias", "sigma", "flags"]
    if version is None:
        return pd.DataFrame(columns=cols)
    t = registry.load_table(version, "stations")
    # The current epoch of a station is its unit with the latest (or open) start.
    start = pd.to_datetime(t["epoch_start"], utc=True)
    t = t.assign(_start=start.fillna(pd.Timestamp.min.tz_localize("UTC").as_unit(start.dt.unit)))
    n_units = t.groupby("station_id")["unit_id"].transform("size")
    t = t.sort_values("_start").groupby("station_id", as_index=False).tail(1)
    flags = pd.Series("", index=t.index, dtype=object)

    def add(mask: pd.Series, name: str) -> None:
        nonlocal flags
        flags = flags.where(~mask, flags + np.where(flags == "", "", ";") + name)

    add(t["partner"].fillna("").astype(str) != "", "correlated-pair")
    add(n_units.loc[t.index] > 1, "epochs")
    add(t["prior_dominated"].astype(bool), "prior-dominated")
    add(t["uncalibrated"].astype(bool), "uncalibrated")
    return pd.DataFrame(
        {"station_id": t["station_id"], "bias": t["bias"], "sigma": t["sigma"], "flags": flags}
    )


def _weight_share(fused: FusedMagnitudes, n: int) -> pd.Series:
    """Mean normalised weight of each station over ``n`` events (0 where absent)."""
    c = fused.contributions
    w = c["weight"].where(c["detected"], 0.0).fillna(0.0)
    return w.groupby(c["station_id"].astype(str), observed=True).sum() / max(n, 1)


def dry_run(
    store: StationMagnitudeStore,
    registry: ModelRegistry,
    cfg: MagfuseConfig,
    *,
    magnitude_type: str | None = None,
    candidate: str | None = None,
    days: float | None = None,
    top: int | None = None,
) -> DryRunReport:
    """Compare a candidate with the active model on the recent events (writes nothing).

    Parameters
    ----------
    candidate : str, optional
        Version id; default the newest version created after the active one
        (:func:`newer_candidate`).
    days : float, optional
        Recent window in days (default ``[nightly] dry_run_days``).
    top : int, optional
        Number of most-moved events listed (default ``[nightly] dry_run_top``).
    """
    mtype = magnitude_type or cfg.learn.magnitude_type
    cand = (
        resolve_version(registry, mtype, candidate)
        if candidate
        else newest_candidate(registry, mtype)
    )
    active_id = registry.active_id(mtype)
    active = registry.get(active_id) if active_id else None
    n_days = float(days if days is not None else cfg.nightly.dry_run_days)
    n_top = int(top if top is not None else cfg.nightly.dry_run_top)
    end = _latest_origin(store, mtype)
    start = end - timedelta(days=n_days)
    obs = load_window(store, mtype, start=start, end=end + timedelta(microseconds=1))

    after = fuse_with_version(obs, registry, cand, cfg)
    before = fuse_with_version(obs, registry, active, cfg) if active else None
    ev_after = after.events.set_index("event_id")
    if before is not None:
        ev_before = before.events.set_index("event_id")["magnitude"]
    else:
        ev_before = ev_after["plain_mean"]
    change = (ev_after["magnitude"] - ev_before).dropna()
    n_events = int(ev_after["magnitude"].notna().sum())

    # Weight shares per station.
    share_after = _weight_share(after, n_events)
    if before is not None:
        share_before = _weight_share(before, n_events)
    else:
        c = after.contributions
        det = c[c["detected"].to_numpy(bool) & ~c["flags"].astype(str).str.contains("clipped")]
        nj = det.groupby("event_id", observed=True)["station_id"].transform("size")
        share_before = (1.0 / nj).groupby(det["station_id"].astype(str), observed=True).sum()
        share_before = share_before / max(n_events, 1)
    st_before = _station_state(registry, active).set_index("station_id")
    st_after = _station_state(registry, cand).set_index("station_id")
    ids = sorted(set(share_after.index) | set(share_before.index) | set(st_after.index))
    stations = pd.DataFrame({"station_id": ids}).set_index("station_id")
    stations["share_before"] = share_before.reindex(ids).fillna(0.0)
    stations["share_after"] = share_after.reindex(ids).fillna(0.0)
    stations["share_change"] = stations["share_after"] - stations["share_before"]
    for col in ("bias", "sigma"):
        stations[f"{col}_before"] = st_before[col].reindex(ids) if len(st_before) else np.nan
        stations[f"{col}_after"] = st_after[col].reindex(ids)
        stations[f"{col}_change"] = stations[f"{col}_after"] - stations[f"{col}_before"]
    fb = (st_before["flags"].reindex(ids) if len(st_before) else pd.Series("", ids)).fillna("")
    fa = st_after["flags"].reindex(ids).fillna("")
    stations["flags_before"] = fb.astype(str)
    stations["flags_after"] = fa.astype(str)
    stations["flags_added"] = [
        ";".join(sorted(set(a.split(";")) - set(b.split(";")) - {""}))
        for a, b in zip(fa, fb, strict=True)
    ]
    stations["flags_removed"] = [
        ";".join(sorted(set(b.split(";")) - set(a.split(";")) - {""}))
        for a, b in zip(fa, fb, strict=True)
    ]
    policy = {
        "max_weight_share_change": float(cfg.nightly.max_weight_share_change),
        "max_bias_change": float(cfg.nightly.max_bias_change),
    }
    stations = order_by_policy(stations.reset_index(), **policy)

    changes: dict[str, Any] = {"n": int(change.shape[0])}
    if change.shape[0]:
        values = change.to_numpy(float)
        changes.update(
            mean=float(values.mean()),
            rms=float(np.sqrt(np.mean(values**2))),
            max_abs=float(np.abs(values).max()),
            quantiles={str(q): float(np.quantile(values, q)) for q in _QUANTILES},
        )
    top_events = _top_events(after, before, ev_before, change, n_top)
    censoring = {
        "before": censoring_summary(before.events) if before is not None else None,
        "after": censoring_summary(after.events),
    }
    agreement = _agreement(obs, registry, cand, active)
    return DryRunReport(
        magnitude_type=mtype,
        active_version=active_id,
        candidate_version=cand.version_id,
        window_start=start.isoformat(),
        window_end=end.isoformat(),
        n_events=n_events,
        stations=stations,
        changes=changes,
        top_events=top_events,
        policy=policy,
        censoring=censoring,
        agreement=agreement,
    )


def order_by_policy(
    stations: pd.DataFrame, *, max_weight_share_change: float, max_bias_change: float
) -> pd.DataFrame:
    """Stations that break the adoption policy first, then by |weight-share change|.

    Adds the boolean column ``outside_policy``: the station's weight share moves by more
    than ``max_weight_share_change`` or its bias by more than ``max_bias_change`` (the limits
    of :meth:`DryRunReport.within_policy`). Within the breaking stations the larger excess
    over its limit comes first.
    """
    share = stations["share_change"].abs().to_numpy(dtype=float)
    bias = np.nan_to_num(stations["bias_change"].abs().to_numpy(dtype=float), nan=0.0)
    excess = np.maximum(share / max_weight_share_change, bias / max_bias_change)
    outside = (share > max_weight_share_change) | (bias > max_bias_change)
    order = np.lexsort((-share, -np.where(outside, excess, 0.0), ~outside))
    out = stations.iloc[order].reset_index(drop=True)
    out["outside_policy"] = outside[order]
    return out


def _top_events(
    after: FusedMagnitudes,
    before: FusedMagnitudes | None,
    ev_before: pd.Series,
    change: pd.Series,
    n_top: int,
) -> pd.DataFrame:
    cols = ["event_id", "origin_time", "before", "after", "change", "reason"]
    if change.empty:
        return pd.DataFrame(columns=cols)
    ids = change.abs().sort_values(ascending=False).index[:n_top]
    ca = after.contributions
    sel_a = ca[ca["event_id"].astype(str).isin(ids) & ca["detected"].to_numpy(bool)]
    wa = sel_a.groupby(
        [sel_a["event_id"].astype(str), sel_a["station_id"].astype(str)], observed=True
    )["weight"].sum()
    if before is not None:
        cb = before.contributions
        sel_b = cb[cb["event_id"].astype(str).isin(ids) & cb["detected"].to_numpy(bool)]
        wb = sel_b.groupby(
            [sel_b["event_id"].astype(str), sel_b["station_id"].astype(str)], observed=True
        )["weight"].sum()
    else:
        nj = sel_a.groupby(sel_a["event_id"].astype(str), observed=True)["weight"].transform("size")
        wb = (
            (1.0 / nj)
            .groupby(
                [sel_a["event_id"].astype(str), sel_a["station_id"].astype(str)], observed=True
            )
            .sum()
        )
    dw = wa.sub(wb, fill_value=0.0)
    ev = after.events.set_index("event_id")
    rows = []
    for eid in ids:  # at most ``top`` events: a short loop for the text of each reason
        moved = dw.xs(eid, level=0) if eid in dw.index.get_level_values(0) else pd.Series()
        moved = moved.reindex(moved.abs().sort_values(ascending=False).index).head(3)
        reason = ", ".join(f"{st} weight {d:+.2f}" for st, d in moved.items()) or "-"
        rows.append(
            {
                "event_id": eid,
                "origin_time": ev.loc[eid, "origin_time"],
                "before": float(ev_before.loc[eid]),
                "after": float(ev.loc[eid, "magnitude"]),
                "change": float(change.loc[eid]),
                "reason": reason,
            }
        )
    return pd.DataFrame(rows, columns=cols)
