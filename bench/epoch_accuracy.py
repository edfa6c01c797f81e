"""Station epochs on evidence (issue 14 targets), several seeds, ratios measured in one run.

Part 1, simulator (:func:`fusion.model.simulation.simulate_network`, K = 40, N = 4000, one
year, +0.3 bias step on station 0 at mid-year), the whole station model fit (epochs on,
non-detections and global test off), per seed:

- *split within 60 readings*: the data cut at the 60th reading of the stepped station after
  the step; success when the fit splits that station with a change time after the start of
  the year's second quarter;
- *one real step and one aftershock sequence*: the full year, with the 300 events nearest to a
  random epicentre moved into 7 days around day 250 (density falling as in an Omori decay)
  and, for those events only, a path offset per station drawn from N(0, 0.2²) (readings of
  one sequence share source region and path); success when the fit makes exactly one epoch,
  on the stepped station; its change time must lie within the reported interval.

Part 2, split-half agreement (:mod:`fusion.workflows.checking`, 10 random splits) of the
default station model, the same with epochs off, and the station-corrected mean, on the demo
(sample_events/) and on the Yellowstone table (tests/data/yellowstone-uuss), with the learning
window widened to the whole table (every other setting default).

Run: ``python bench/epoch_accuracy.py [N_SEEDS]`` (default 10; about 12 s per seed and
40 s for part 2 on 2 cores).
"""

from __future__ import annotations

import sys
import time
import warnings
from dataclasses import replace

import numpy as np

from fusion.model.simulation import SimulationConfig, simulate_network
from fusion.model.station_model import StationModel
from fusion.observations import ObservationSet


def _fit(obs: ObservationSet, **kw: object) -> StationModel:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return StationModel(
            global_test_replicates=0,
            use_nondetections=False,
            random_state=0,
            **kw,  # type: ignore[arg-type]
        ).fit(obs)


def _step_time(cfg: SimulationConfig) -> np.datetime64:
    return np.datetime64(cfg.start, "us") + np.timedelta64(int(cfg.bias_step_day * 86400e6), "us")


def _cut_after(
    obs: ObservationSet, station: int, step: np.datetime64, n_after: int
) -> ObservationSet:
    """Rows of events up to the ``n_after``-th detected reading of ``station`` after ``step``."""
    t_row = obs.event_time[obs.event]
    mine = np.sort(t_row[(obs.station == station) & obs.detected & (t_row >= step)])
    end = mine[min(n_after, mine.shape[0]) - 1]
    return obs.subset(t_row <= end)


def _with_aftershocks(sim, rng: np.random.Generator) -> ObservationSet:  # type: ignore[no-untyped-def]
    obs = sim.observations
    centre = sim.event_xy[rng.integers(0, sim.event_xy.shape[0])]
    d = np.hypot(*(sim.event_xy - centre).T)
    seq = np.argsort(d)[:300]
    start = np.datetime64(sim.config.start, "us") + np.timedelta64(int(247 * 86400e6), "us")
    u = np.sort(rng.random(seq.shape[0]))
    offset_days = 7.0 * u**3  # most events early in the week
    times = obs.event_time.copy()
    times[seq] = start + (offset_days * 86400e6).astype("timedelta64[us]")
    in_seq = np.zeros(obs.n_events, dtype=bool)
    in_seq[seq] = True
    path = rng.normal(0.0, 0.2, obs.n_stations)
    mag = obs.magnitude + np.where(in_seq[obs.event], path[obs.station], 0.0)
    return replace(obs, event_time=times, magnitude=mag)


def part1(n_seeds: int) -> None:
    cfg = SimulationConfig(bias_step=0.3, bias_step_station=0)
    split60 = one_epoch = covered = 0
    t0 = time.perf_counter()
    for seed in range(n_seeds):
        sim = simulate_network(cfg, seed=500 + seed)
        step = _step_time(cfg)
        cut = _cut_after(sim.observations, 0, step, 60)
        m = _fit(cut)
        et = m.epoch_table_
        quarter = np.datetime64(cfg.start, "us") + np.timedelta64(int(91 * 86400e6), "us")
        mine = et[(et["station_id"] == str(cut.station_ids[0]))]
        split60 += int((mine["change_time"].to_numpy() >= quarter).any())
        obs = _with_aftershocks(sim, np.random.default_rng(900 + seed))
        m2 = _fit(obs)
        et2 = m2.epoch_table_
        on_step = et2["station_id"] == str(obs.station_ids[0])
        ok = len(et2) == 1 and bool(on_step.all())
        one_epoch += int(ok)
        if on_step.any():
            r = et2[on_step].iloc[0]
            lo = np.datetime64(r["change_time_low"], "us")
            hi = np.datetime64(r["change_time_high"], "us")
            covered += int(lo < step <= hi)
        print(
            f"  seed {500 + seed}: cut at 60 readings -> {len(mine)} epoch(s) on the stepped "
            f"station; with aftershocks {len(et2)} epoch(s): "
            + ", ".join(
                f"{s} {str(t)[:10]} [{str(a)[:10]}, {str(b)[:10]}] step {v:+.3f}"
                for s, t, a, b, v in zip(
                    et2["station_id"],
                    et2["change_time"],
                    et2["change_time_low"],
                    et2["change_time_high"],
                    et2["step"],
                    strict=True,
                )
            ),
            flush=True,
        )
    n = n_seeds
    print(
        f"simulator, {n} seeds ({time.perf_counter() - t0:.0f} s): +0.3 step split within 60 "
        f"readings in {split60}/{n} = {split60 / n:.2f}; step + aftershock sequence -> exactly one "
        f"epoch in {one_epoch}/{n} = {one_epoch / n:.2f}; true change time inside the reported "
        f"interval in {covered}/{n} = {covered / n:.2f} (targets: 60 readings, >= 0.90, >= 0.90)"
    )


def _agreement(name: str, obs: ObservationSet) -> None:
    from fusion.settings import MagfuseConfig
    from fusion.workflows.checking import CORRECTED_MEAN, check_observations

    cfg = MagfuseConfig()
    # Every default, except that the learning window covers the whole table (the default
    # 360-day window with 120-day forgetting would fit the Yellowstone model on its last
    # year only, while the check scores all of its years).
    cfg = cfg.model_copy(
        update={"learn": cfg.learn.model_copy(update={"window_days": 1e5, "half_life_days": 1e6})}
    )
    t0 = time.perf_counter()
    models = {}
    for label, enabled in (("default (epochs on)", True), ("epochs off", False)):
        ep = cfg.epochs.model_copy(update={"enabled": enabled})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = StationModel.from_config(
                cfg.learn, cfg.pairs, ep, censoring=cfg.censoring
            ).set_params(global_test_replicates=0)
            model.fit(obs)
        models[label] = model.parameters_
        print(f"  {name}: {label}: {len(model.epoch_table_)} epoch split(s)")
    rep = check_observations(obs, models, examined="default (epochs on)", active="epochs off")
    ag = rep.agreement
    d = ag.column("default (epochs on)") - ag.column("epochs off")
    for row in ag.summary(reference=CORRECTED_MEAN):
        print(
            f"  {name}: {row['estimator']:<22} agreement SD {row['agreement_sd']:.4f} "
            f"± {row['agreement_sd_spread']:.4f}; ratio to corrected mean {row['ratio']:.3f} "
            f"± {row['ratio_spread']:.3f}"
        )
    print(
        f"  {name}: default - epochs off = {d.mean():+.4f} (seed-to-seed SD {d.std(ddof=1):.4f}); "
        f"{ag.n_events} events; {time.perf_counter() - t0:.0f} s"
    )


def part2() -> None:
    import pandas as pd

    import sample_events
    from stations.readers.csv import read_csv
    from tests.datasets import YELLOWSTONE_CSV

    rec = read_csv(sample_events.demo_csv_path()).records
    _agreement("demo", ObservationSet.from_frame(rec, magnitude_type="ML"))
    if YELLOWSTONE_CSV.is_file():
        frame = pd.read_csv(YELLOWSTONE_CSV, dtype={"Evid": str})
        t = pd.to_datetime(frame["Date"] + "T" + frame["Time"], format="ISO8601")
        obs = ObservationSet.from_rows(
            magnitude_type="ML",
            event_id=frame["Evid"].to_numpy(),
            station_id=(frame["Net"] + "." + frame["Sta"] + ".").to_numpy(),
            magnitude=frame["SML"].to_numpy(),
            origin_time=t.to_numpy(),
        )
        _agreement("Yellowstone", obs)


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 10
    which = sys.argv[2] if len(sys.argv) > 2 else "12"
    if "1" in which:
        part1(n)
    if "2" in which:
        part2()


if __name__ == "__main__":
    main()
