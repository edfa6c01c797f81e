"""``magfuse demo``: the whole job on the invented demo network, scored against its truth.

The demo network (``sample_events/``, invented: see its README) is replayed as an operator
would live it: the first half-year is ingested, a model is learned and adopted and the events
are fused; then the second half-year arrives, a candidate is learned, its dry run is shown, it
is adopted and everything is fused again; one event is explained; the station report is
written. Because the demo's truth is known, the fused magnitudes are scored against it, beside
the plain mean and the median of the same station magnitudes.

The anchor (docs/model.md §3) fixes the common level of all magnitudes: without reference events no
method can know it, so the scores are given after removing one common offset per method (the
median error), and the offset itself is printed.
"""

from __future__ import annotations

import shlex
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fusion.advisory import ADVISORY
from fusion.model.parameters import StationParameters
from fusion.wording import count, number

__all__ = ["DemoResult", "next_commands", "oracle_parameters", "run_demo", "score_against_truth"]

#: First and second half of the demo year.
SPLIT = "2025-07-01T00:00:00Z"


@dataclass(frozen=True, slots=True)
class DemoResult:
    """Where the demo wrote things and how it scored."""

    store: Path
    report: Path
    scores: pd.DataFrame
    first_version: str
    second_version: str
    explained_event: str


def _quarantined(n: int) -> str:
    return f"{number(n)} quarantined"


def next_commands(store_dir: Path, event_id: str) -> list[str]:
    """What to try next on the demo's store, as lines to print (every command with --store).

    The demo writes its own store (``<workdir>/store``), not the default one of the
    configuration, so each command names it.
    """
    where = shlex.quote(str(store_dir))
    tries = (
        ("store", "what the store holds"),
        ("models", "the two model versions; the active one is marked *"),
        (f"event {shlex.quote(event_id)}", "the event explained above"),
        ("export magnitudes --format quakeml --out demo.xml", "the network magnitudes"),
        ("report --out demo-report", "the station report again"),
    )
    lines = [f"the demo's store is {store_dir}; try on it:"]
    lines += [f"  magfuse {cmd} --store {where}    # {what}" for cmd, what in tries]
    return lines


def oracle_parameters() -> StationParameters:
    """The demo's true station parameters as a model: the oracle of docs/simulation.md.

    True biases (with the stepped station split into its two epochs), true error SDs, the true
    correlated pairs with c = ρ σ_k σ_l, and no bias uncertainty. Fusing with it (censored
    likelihood included) is the best any method could do knowing the truth.
    """
    import sample_events
    from fusion.model.parameters import epoch_unit_id
    from fusion.network.gls_blocks import PairCovariance

    paths = sample_events.demo_truth_paths()
    st = pd.read_csv(paths.stations)
    steps = pd.read_csv(paths.steps)
    pairs = pd.read_csv(paths.pairs)
    nat = np.datetime64("NaT", "us")
    ids = st["station_id"].astype(str).tolist()
    unit_ids, station_ids, bias, sigma = list(ids), list(ids), list(st["bias"]), list(st["sigma"])
    start = [nat] * len(ids)
    end = [nat] * len(ids)
    for r in steps.to_dict(orient="records"):
        t = pd.Timestamp(r["time"]).tz_convert(None).to_datetime64().astype("datetime64[us]")
        i = ids.index(str(r["station_id"]))
        bias[i], end[i] = float(r["bias_before"]), t
        unit_ids.append(epoch_unit_id(str(r["station_id"]), t))
        station_ids.append(str(r["station_id"]))
        bias.append(float(r["bias_after"]))
        sigma.append(sigma[i])
        start.append(t)
        end.append(nat)
    s = np.asarray(sigma, dtype=float)
    k = np.array([unit_ids.index(str(a)) for a in pairs["station_id_1"]], dtype=np.int64)
    l = np.array([unit_ids.index(str(b)) for b in pairs["station_id_2"]], dtype=np.int64)
    c = pairs["rho"].to_numpy(float) * s[k] * s[l]
    n = len(unit_ids)
    return StationParameters(
        magnitude_type="ML",
        unit_ids=np.asarray(unit_ids, dtype=object),
        station_ids=np.asarray(station_ids, dtype=object),
        epoch_start=np.asarray(start, dtype="datetime64[us]"),
        epoch_end=np.asarray(end, dtype="datetime64[us]"),
        bias=np.asarray(bias, dtype=float),
        bias_var=np.zeros(n),
        sigma2=s**2,
        prior_dominated=np.zeros(n, dtype=bool),
        pairs=PairCovariance(k, l, c, n),
        tau_b2=float(np.var(st["bias"])),
        s0_2=float(np.median(s**2)),
    )


def score_against_truth(
    events: pd.DataFrame,
    truth: pd.DataFrame,
    *,
    confidence_level: float,
    oracle: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Errors of the fused magnitude, the plain mean and the median against true magnitudes.

    Parameters
    ----------
    events : DataFrame
        Fused events (``magnitude``, ``se``, ``plain_mean``, ``median``, ``event_id``).
    truth : DataFrame
        ``event_id``, ``magnitude`` (true).
    oracle : DataFrame, optional
        The same events fused with the true station parameters (:func:`oracle_parameters`);
        adds a row ``oracle``.

    Returns
    -------
    DataFrame
        One row per method: n, offset (median error, the common level), rmse and bias after
        removing the offset, raw rmse, and for the fused value the coverage of its interval
        at ``confidence_level``.
    """
    from scipy.stats import norm

    t = truth.set_index("event_id")["magnitude"]
    ev = events.set_index("event_id")
    ev = ev[ev["magnitude"].notna() & ev.index.isin(t.index)]
    if oracle is not None:
        ev = ev.assign(oracle=oracle.set_index("event_id")["magnitude"].reindex(ev.index))
    true = t.reindex(ev.index).to_numpy(float)
    rows: list[dict[str, Any]] = []
    z = float(norm.ppf(0.5 + confidence_level / 2.0))
    methods = [("fused", "magnitude"), ("plain mean", "plain_mean"), ("median", "median")]
    if oracle is not None:
        methods.append(("oracle", "oracle"))
    for name, col in methods:
        est = ev[col].to_numpy(float)
        ok = np.isfinite(est)
        err = est[ok] - true[ok]
        offset = float(np.median(err))
        row: dict[str, Any] = {
            "method": name,
            "n": int(ok.sum()),
            "offset": offset,
            "rmse": float(np.sqrt(np.mean((err - offset) ** 2))),
            "rmse_raw": float(np.sqrt(np.mean(err**2))),
            "coverage": np.nan,
        }
        if col == "magnitude":
            se = ev["se"].to_numpy(float)[ok]
            row["coverage"] = float(np.mean(np.abs(err - offset) <= z * se))
        rows.append(row)
    return pd.DataFrame(rows)


def _split_input(csv: Path, workdir: Path) -> tuple[Path, Path]:
    """The demo year as two files: first and second half (what arrives in each half)."""
    frame = pd.read_csv(csv, dtype=str, keep_default_na=False)
    t = pd.to_datetime(frame["origin_time"], utc=True)
    cut = pd.Timestamp(SPLIT)
    folder = workdir / "input"
    folder.mkdir(parents=True, exist_ok=True)
    first, second = folder / "demo_first_half.csv", folder / "demo_second_half.csv"
    frame[t < cut].to_csv(first, index=False)
    frame[t >= cut].to_csv(second, index=False)
    return first, second


def run_demo(workdir: Path, *, echo: Callable[[str], None] = print) -> DemoResult:
    """Run the demo in ``workdir`` (its ``store``, ``input`` and ``report`` are replaced)."""
    import sample_events
    from fusion.settings import load_config
    from fusion.versions.fused_store import FusedStore
    from fusion.versions.model_registry import ModelRegistry
    from fusion.workflows.dry_run import dry_run
    from fusion.workflows.event_view import explain_event, render_event
    from fusion.workflows.fusing import fuse_observations, fuse_window
    from fusion.workflows.learning import learn_candidate
    from fusion.workflows.reporting import write_model_report
    from stations.ingest import ingest_file
    from stations.metadata import StationMetadata
    from stations.store import StationMagnitudeStore

    cfg = load_config()
    workdir = Path(workdir)
    for sub in ("store", "input", "report"):
        shutil.rmtree(workdir / sub, ignore_errors=True)
    workdir.mkdir(parents=True, exist_ok=True)
    first, second = _split_input(sample_events.demo_csv_path(), workdir)
    store = StationMagnitudeStore.open(workdir / "store")
    registry = ModelRegistry(store.root, lock=store.write_lock)
    fused_store = FusedStore(store.root, lock=store.write_lock)
    metadata = StationMetadata.read(sample_events.demo_stations_path())

    def step(title: str) -> None:
        echo("")
        echo(f"== {title}")

    step("1. first half-year arrives: ingest")
    out = ingest_file(store, first)
    r = out.report
    echo(f"{first.name}: {count(r.accepted, 'reading')} stored, " + _quarantined(r.quarantined))

    step("2. learn station biases, error SDs and correlated pairs (no ground truth); adopt")
    v1 = learn_candidate(store, registry, cfg, now=datetime.now(UTC)).version
    _echo_model(echo, v1.meta)
    registry.adopt(v1.version_id)
    res = fuse_window(store, registry, cfg, magnitude_type="ML")
    fused_store.write_run(res.fused, model_version=v1.version_id)
    echo(f"adopted {v1.version_id}; {len(res.fused.events):,} events fused")

    step("3. second half-year arrives: ingest, learn a candidate, dry run before adopting")
    r = ingest_file(store, second).report
    echo(f"{second.name}: {count(r.accepted, 'reading')} stored, " + _quarantined(r.quarantined))
    v2 = learn_candidate(store, registry, cfg, now=datetime.now(UTC)).version
    _echo_model(echo, v2.meta)
    dr = dry_run(store, registry, cfg, magnitude_type="ML", candidate=v2.version_id, top=5)
    text = dr.render_text(max_stations=8).splitlines()
    echo("\n".join(text))
    ok, reasons = dr.within_policy(
        max_weight_share_change=cfg.nightly.max_weight_share_change,
        max_bias_change=cfg.nightly.max_bias_change,
    )
    echo(
        "dry run within the adoption policy"
        if ok
        else "dry run outside the adoption policy (the nightly job would ask for review): "
        + "; ".join(reasons)
    )
    registry.adopt(v2.version_id)
    echo(f"the demo adopts {v2.version_id} by hand ('magfuse adopt')")
    res = fuse_window(store, registry, cfg, magnitude_type="ML")
    fused_store.write_run(res.fused, model_version=v2.version_id)

    step("4. one event explained")
    ev = res.fused.events
    busy = ev[(ev["n_stations"] >= 5) & ev["magnitude"].notna()]
    pick = busy.iloc[int(np.argmax(np.abs(busy["minus_plain_mean"].to_numpy(float))))]
    event_id = str(pick["event_id"])
    echo(render_event(explain_event(store, registry, cfg, event_id)).replace(ADVISORY, "").rstrip())

    step("5. scored against the demo's known truth (invented data only)")
    truth = pd.read_csv(sample_events.demo_truth_paths().events)
    oracle = fuse_observations(res.observations, oracle_parameters(), cfg).events
    scores = score_against_truth(
        ev, truth, confidence_level=cfg.network.confidence_level, oracle=oracle
    )
    echo(_render_scores(scores, cfg.network.confidence_level))

    step("6. station reliability report")
    files = write_model_report(
        store, registry, cfg, workdir / "report", magnitude_type="ML", metadata=metadata
    )
    echo(f"report   {files.html}")
    echo(f"tables   {files.station_csv}")
    echo("")
    echo("\n".join(next_commands(store.root, event_id)))
    echo("")
    echo(ADVISORY)
    return DemoResult(
        store=store.root,
        report=files.html,
        scores=scores,
        first_version=v1.version_id,
        second_version=v2.version_id,
        explained_event=event_id,
    )


def _echo_model(echo: Callable[[str], None], m: dict[str, Any] | Any) -> None:
    anchor = m.get("anchor") or {}
    echo(
        f"model {m['version']}: {count(m['n_events'], 'event')}, "
        f"{count(m['n_stations'], 'station')} ({count(m['n_units'], 'station epoch')}), "
        f"{count(m['n_pairs_flagged'], 'correlated pair')}, "
        f"{count(m['n_epoch_splits'], 'bias step')}; anchor {anchor.get('kind')} "
        f"(calibration uncertainty {anchor.get('se', float('nan')):.3f})"
    )


def _render_scores(scores: pd.DataFrame, level: float) -> str:
    from fusion.network.network_magnitude import interval_name

    lines = [
        "errors against the true magnitudes, after removing one common level offset per method",
        f"{'method':<11} {'events':>6} {'RMSE':>7} {'raw RMSE':>9} {'offset':>7} "
        f"coverage of the {interval_name(level)}",
    ]
    for r in scores.to_dict(orient="records"):
        cov = "" if not np.isfinite(r["coverage"]) else f"{r['coverage']:.3f}"
        lines.append(
            f"{r['method']:<11} {number(r['n']):>6} {r['rmse']:7.3f} {r['rmse_raw']:9.3f} "
            f"{r['offset']:+7.3f} {cov}"
        )
    rmse = {str(r["method"]): float(r["rmse"]) for r in scores.to_dict(orient="records")}
    lines.append(f"fused RMSE / plain-mean RMSE = {rmse['fused'] / rmse['plain mean']:.2f}")
    if "oracle" in rmse:
        lines.append(
            f"fused RMSE / oracle RMSE = {rmse['fused'] / rmse['oracle']:.3f} "
            "(oracle: the true station parameters)"
        )
    return "\n".join(lines)
