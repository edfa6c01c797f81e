"""Benchmark of ``magfuse event EVENT_ID`` as a whole process on a 10-million-row store.

What an analyst waits for: interpreter start, imports, the indexed look-up of one event in the
store, fusing it with the active model and rendering the text. Measured side by side in one run,
interleaved (one round = one of each, so drift hits all three alike):

- ``python -c pass`` (interpreter start);
- ``python -c "import pandas, pyarrow"`` (the floor of any command that reads Parquet);
- the libraries the event path needs short of ``scipy.stats`` (pandas, pyarrow's parquet and
  compute, typer, pydantic, ``scipy.special``): what the command would cost if its only use of
  ``scipy.stats`` (``fusion/network/censoring.py``, the normal log-density) were written with numpy;
- ``magfuse event EVENT_ID --store STORE`` for several events (the installed console script);
- the same command with ``scipy.stats`` replaced, before anything imports it, by a module whose
  ``norm.logpdf`` is the numpy formula -z²/2 - log sqrt(2 pi): the proposed fix, measured
  without editing the library (its output is checked to be identical).

The median wall time of each is printed with the ratios. Target: ``magfuse event`` under 1 s.
When it is over, the import profile (``python -X importtime``, largest top-level imports by
cumulative time) and an in-process split (imports, look-up and fuse, rendering) say what costs
what.

The store is built with the vectorised builder of ``bench/store_bench.py`` (default 10 million
rows: 2,000 stations, 500,000 events, one batch per origin month) unless ``--store`` names an
existing one. The model is **synthetic**: a :class:`~fusion.model.parameters.StationParameters`
with one unit per station (biases N(0, 0.15²), error SDs 0.15-0.35, no pairs) saved through
:class:`~fusion.versions.model_registry.ModelRegistry` and adopted. Learning on 10 million rows is
the
job of ``bench/fit_speed.py``; ``magfuse event`` only reads a stored version, whatever fitted it.

Usage::

    python bench/event_view_speed.py --store bench/out/store10m   # build once, then reuse
    python bench/event_view_speed.py --rows 200000                # quick run, temporary store
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq

from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from fusion.versions.model_registry import ModelRegistry
from stations.store import StationMagnitudeStore

HERE = Path(__file__).resolve().parent
TARGET_S = 1.0

_FLOOR = (
    "import pandas, pyarrow.parquet, pyarrow.compute, typer, pydantic; from scipy import special"
)

_NO_STATS = """
import math, sys, types
import numpy as np
import scipy

class _Norm:
    @staticmethod
    def logpdf(z):
        z = np.asarray(z, dtype=float)
        return -0.5 * z * z - 0.5 * math.log(2.0 * math.pi)

stub = types.ModuleType("scipy.stats")
stub.norm = _Norm()
sys.modules["scipy.stats"] = stub
scipy.stats = stub
from fusion.cli.app import main
sys.argv = ["magfuse", *sys.argv[1:]]
main()
"""

_SPLIT = """
import json, sys, time
t0 = time.perf_counter()
import fusion.cli.app
t1 = time.perf_counter()
from fusion.settings import load_config
from fusion.cli.common import open_registry, open_store
from fusion.workflows.event_view import explain_event, render_event
import fusion.workflows.fusing, fusion.network.network_magnitude, fusion.observations
t2 = time.perf_counter()
cfg = load_config()
st = open_store(cfg, __import__("pathlib").Path(sys.argv[1]))
ex = explain_event(st, open_registry(st), cfg, sys.argv[2])
t3 = time.perf_counter()
text = render_event(ex)
t4 = time.perf_counter()
print(json.dumps({"cli_app": t1 - t0, "event_imports": t2 - t1, "lookup_and_fuse": t3 - t2,
                  "render": t4 - t3}))
"""


def _store_bench() -> Any:
    spec = importlib.util.spec_from_file_location("store_bench", HERE / "store_bench.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def synthetic_parameters(station_ids: np.ndarray, seed: int) -> StationParameters:
    """One unit per station: bias N(0, 0.15²), error SD U(0.15, 0.35), no pairs, known well."""
    rng = np.random.default_rng(seed)
    k = station_ids.shape[0]
    nat = np.full(k, np.datetime64("NaT", "us"))
    return StationParameters(
        magnitude_type="ML",
        unit_ids=station_ids.astype(object),
        station_ids=station_ids.astype(object),
        epoch_start=nat,
        epoch_end=nat.copy(),
        bias=np.asarray(rng.normal(0.0, 0.15, k), dtype=np.float64),
        bias_var=np.full(k, 0.02**2),
        sigma2=np.asarray(rng.uniform(0.15, 0.35, k), dtype=np.float64) ** 2,
        prior_dominated=np.zeros(k, dtype=bool),
        pairs=PairCovariance.empty(k),
        tau_b2=0.15**2,
        s0_2=0.25**2,
    )


def ensure_store(root: Path, rows: int, seed: int) -> StationMagnitudeStore:
    """Build the store (if absent) and adopt a synthetic model (if none is active)."""
    if not (root / "manifest.json").exists():
        _store_bench().build(root, rows, seed)
    store = StationMagnitudeStore.open(root, create=False)
    reg = ModelRegistry(store.root, lock=store.write_lock)
    if reg.active_id("ML") is None:
        ids = np.array([f"XX.S{i:04d}." for i in range(_store_bench().N_STATIONS)])
        meta = {"note": "synthetic parameters for bench/event_view_speed.py", "seed": seed}
        reg.adopt(reg.save(synthetic_parameters(ids, seed), meta).version_id)
        print(f"adopted a synthetic model of {ids.size:,} stations")
    return store


def event_ids(root: Path, n: int, seed: int) -> list[str]:
    """``n`` random event ids from the store's event index files."""
    files = sorted((root / "index").glob("*.parquet"))
    ids = np.concatenate(
        [pq.read_table(f, columns=["event_id"])["event_id"].to_numpy() for f in files]
    )
    rng = np.random.default_rng(seed)
    return [str(e) for e in rng.choice(np.unique(ids), n, replace=False)]


def wall(cmd: list[str]) -> float:
    """Wall time of one process, seconds; it must succeed."""
    t = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t


def import_profile(cmd: list[str], top: int) -> list[tuple[str, float]]:
    """Largest top-level imports of ``cmd`` (run with ``-X importtime``): (module, seconds)."""
    res = subprocess.run(
        [sys.executable, "-X", "importtime", *cmd], capture_output=True, text=True, check=True
    )
    out = []
    for line in res.stderr.splitlines():
        m = re.match(r"import time:\s+(\d+) \|\s+(\d+) \| ( *)(\S+)", line)
        if m and len(m[3]) <= 1:  # top level: imported by the command, not by a library
            out.append((m[4], int(m[2]) / 1e6))
    return sorted(out, key=lambda kv: -kv[1])[:top]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--store", type=Path, default=None, help="build here once, reuse later")
    ap.add_argument("--rows", type=int, default=10_000_000, help="rows of a new store")
    ap.add_argument("--events", type=int, default=9, help="events timed (one per round)")
    ap.add_argument("--seed", type=int, default=20240601)
    args = ap.parse_args()

    tmp = None
    if args.store is None:
        tmp = tempfile.mkdtemp(prefix="magfuse-event-bench-")
        root = Path(tmp) / "store"
    else:
        root = args.store
    try:
        ensure_store(root, args.rows, args.seed)
        magfuse = shutil.which("magfuse")
        base = (
            [magfuse]
            if magfuse
            else [sys.executable, "-c", "from fusion.cli.app import main; main()"]
        )
        picks = event_ids(root, args.events, args.seed + 1)
        py = sys.executable
        wall([*base, "event", picks[0], "--store", str(root)])  # warm the page cache once
        probe = [*base, "event", picks[0], "--store", str(root)]
        same = subprocess.run(probe, capture_output=True, text=True, check=True).stdout
        fixed = [py, "-c", _NO_STATS, "event", picks[0], "--store", str(root)]
        if subprocess.run(fixed, capture_output=True, text=True, check=True).stdout != same:
            sys.exit("the scipy.stats stand-in changed the output of magfuse event")
        times: dict[str, list[float]] = {
            "pass": [],
            "pandas": [],
            "floor": [],
            "event": [],
            "no_stats": [],
        }
        for ev in picks:  # one round: one of each, interleaved
            times["pass"].append(wall([py, "-c", "pass"]))
            times["pandas"].append(wall([py, "-c", "import pandas, pyarrow"]))
            times["floor"].append(wall([py, "-c", _FLOOR]))
            times["event"].append(wall([*base, "event", ev, "--store", str(root)]))
            times["no_stats"].append(wall([py, "-c", _NO_STATS, "event", ev, "--store", str(root)]))
        med = {k: statistics.median(v) for k, v in times.items()}
        print(f"store {root}: {len(picks)} events timed, medians of {len(picks)} runs each")
        print(f"  python -c pass                   {med['pass']:.3f} s")
        print(f"  python -c 'import pandas, pyarrow' {med['pandas']:.3f} s")
        print(f"  libraries short of scipy.stats   {med['floor']:.3f} s")
        print(
            f"  magfuse event EVENT_ID           {med['event']:.3f} s "
            f"(min {min(times['event']):.3f}, max {max(times['event']):.3f})"
        )
        print(f"  magfuse event, no scipy.stats    {med['no_stats']:.3f} s")
        print(
            f"ratios: event / pass {med['event'] / med['pass']:.1f}, "
            f"event / (import pandas, pyarrow) {med['event'] / med['pandas']:.2f}, "
            f"event / (libraries short of scipy.stats) {med['event'] / med['floor']:.2f}, "
            f"event without scipy.stats / event {med['no_stats'] / med['event']:.2f}"
        )
        verdict = "under" if med["event"] < TARGET_S else "OVER"
        print(f"target {TARGET_S:g} s: {verdict}")

        split = json.loads(
            subprocess.run(
                [py, "-c", _SPLIT, str(root), picks[0]], capture_output=True, text=True, check=True
            ).stdout
        )
        print(
            "in-process split (one event): " + ", ".join(f"{k} {v:.3f} s" for k, v in split.items())
        )
        cmd = [magfuse, "event", picks[0], "--store", str(root)] if magfuse else base[1:]
        print("largest top-level imports of 'magfuse event' (cumulative, -X importtime):")
        for name, sec in import_profile(cmd, 12):
            print(f"  {sec:.3f} s  {name}")
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
