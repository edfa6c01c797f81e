"""Load benchmark of ``magfuse serve`` against 127.0.0.1 only (bounded in count and time).

Measured, each in one run so machine noise hits both sides of a ratio alike:

1. **One-event read** ``GET /v1/events/{id}`` at ``--clients`` concurrent clients (default 50)
   over random stored events: p50 and p99 latency, as a ratio to ``GET /static/magfuse.css``
   (a static file served by the same stack, same clients). Target p99 <= 50 ms.
2. **Submission to fused value readable** for a 30-station event: time from sending
   ``POST /v1/submissions`` until ``GET /v1/events/{id}`` returns the recorded preliminary
   magnitude (fusion on arrival happens before the POST returns). Target p99 <= 1 s.
3. **Sustained submission rate**: rows/s over ``--bodies`` submissions of 30 rows from 4 clients,
   against ``magfuse ingest`` of the same rows as files (one process, one batch per file) on a
   copy of the same store. The service also fuses every submitted event; ingest does not.

The store: ``--store DIR`` (an existing store with an active ML model; it is copied, never
changed), else one built with the vectorised builder of ``bench/store_bench.py`` (``--rows``,
default 1,000,000 station magnitudes: building 10 million takes several minutes on two cores)
and a synthetic model, as ``bench/event_view_speed.py`` does. Submitted events use the model's
stations with synthetic magnitudes (event magnitude + station noise).

Every request goes to 127.0.0.1; the load is bounded by ``--reads`` requests per phase and a
wall-clock cap (``--max-seconds`` per phase).

Usage::

    python bench/service_load.py                      # 1 M-row store, about 2 minutes
    python bench/service_load.py --rows 200000 --reads 1000 --bodies 20   # quick
"""

from __future__ import annotations

import argparse
import asyncio
import importlib.util
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
REPO = HERE.parent


def _sibling(name: str) -> Any:
    spec = importlib.util.spec_from_file_location(name, HERE / f"{name}.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start(store: Path, log: Path) -> tuple[subprocess.Popen[bytes], str]:
    port = free_port()
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "from fusion.cli.app import main; main()",
            "serve",
            "--store",
            str(store),
            "--port",
            str(port),
        ],
        stdout=log.open("wb"),
        stderr=subprocess.STDOUT,
        env=env,
    )
    url = f"http://127.0.0.1:{port}"
    for _ in range(600):
        try:
            if httpx.get(url + "/v1/ready", timeout=1).status_code == 200:
                return proc, url
        except httpx.HTTPError:
            time.sleep(0.1)
    proc.kill()
    raise SystemExit(f"server did not start; see {log}")


def pct(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q)) * 1000.0


async def _get(reader: Any, writer: Any, host: str, path: str) -> int:
    """One HTTP/1.1 keep-alive GET on an open connection; returns the status code.

    A minimal client on purpose: a full-featured one costs more CPU per request than the
    server's static-file path, and on two cores the load generator would measure itself.
    """
    writer.write(f"GET {path} HTTP/1.1\r\nHost: {host}\r\n\r\n".encode())
    head = await reader.readuntil(b"\r\n\r\n")
    status = int(head[9:12])
    length = 0
    for line in head.split(b"\r\n"):
        if line[:15].lower() == b"content-length:":
            length = int(line[15:])
    if length:
        await reader.readexactly(length)
    return status


async def closed_loop(url: str, paths: list[str], clients: int, cap_s: float) -> list[float]:
    """``clients`` concurrent connections, each sending the next path when its last returns."""
    host_port = url.split("//", 1)[1]
    host, port = host_port.split(":")
    latencies: list[float] = []
    queue = list(reversed(paths))
    deadline = time.monotonic() + cap_s

    async def worker() -> None:
        reader, writer = await asyncio.open_connection(host, int(port))
        try:
            while queue and time.monotonic() < deadline:
                path = queue.pop()
                t = time.perf_counter()
                status = await _get(reader, writer, host_port, path)
                latencies.append(time.perf_counter() - t)
                if status != 200:
                    raise SystemExit(f"{path}: HTTP {status}")
        finally:
            writer.close()

    await asyncio.gather(*(worker() for _ in range(clients)))
    return latencies


def event_ids(root: Path, n: int, seed: int) -> list[str]:
    import pyarrow.parquet as pq

    files = sorted((root / "index").glob("*.parquet"))
    ids = np.unique(
        np.concatenate(
            [pq.read_table(f, columns=["event_id"])["event_id"].to_numpy() for f in files]
        )
    )
    rng = np.random.default_rng(seed)
    return [str(e) for e in rng.choice(ids, min(n, ids.size), replace=False)]


def synthetic_events(
    stations: list[str], n_events: int, n_stations: int, seed: int, t0: pd.Timestamp
) -> list[pd.DataFrame]:
    """``n_events`` events of ``n_stations`` detections each, in magfuse CSV columns."""
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n_events):
        picked = rng.choice(np.asarray(stations, dtype=object), n_stations, replace=False)
        parts = [s.split(".") for s in picked]
        m = rng.uniform(1.5, 4.0)
        out.append(
            pd.DataFrame(
                {
                    "event_id": f"bench-{seed}-{k:05d}",
                    "origin_time": (t0 + pd.Timedelta(minutes=k)).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
                    "network": [p[0] for p in parts],
                    "station": [p[1] for p in parts],
                    "location": [p[2] if len(p) > 2 else "" for p in parts],
                    "magnitude_type": "ML",
                    "magnitude": np.round(m + rng.normal(0, 0.25, n_stations), 3),
                    "detected": "true",
                }
            )
        )
    return out


def server_side(log: Path) -> None:
    """Median and p99 of the server's own per-request times (its request log), by route."""
    import re

    times: dict[str, list[float]] = {"event read": [], "static file": [], "submission": []}
    for line in log.read_text(errors="replace").splitlines():
        m = re.search(r'"(GET|POST) (\S+)" (\d+) ([\d.]+) ms', line)
        if not m:
            continue
        path, ms = m[2], float(m[4]) / 1000.0
        if path.startswith("/v1/events/"):
            times["event read"].append(ms)
        elif path.startswith("/static/"):
            times["static file"].append(ms)
        elif path == "/v1/submissions":
            times["submission"].append(ms)
    for name, values in times.items():
        if values:
            print(
                f"  in the server (request log), {name}: p50 {pct(values, 50):.1f} ms, "
                f"p99 {pct(values, 99):.1f} ms over {len(values)} requests"
            )


def read_phase(url: str, root: Path, args: argparse.Namespace) -> None:
    """One-event reads (uncached, then a hot set of 100) against the static file."""
    ids = event_ids(root, args.reads + 100, args.seed)
    hot, cold = ids[:100], ids[100 : 100 + min(args.reads, 300)]
    ev = asyncio.run(
        closed_loop(url, [f"/v1/events/{i}" for i in cold], args.clients, args.max_seconds)
    )
    print(
        f"one-event read of distinct events (nothing cached), {args.clients} clients, "
        f"{len(ev)} requests: p50 {pct(ev, 50):.1f} ms, p99 {pct(ev, 99):.1f} ms"
    )
    rng = np.random.default_rng(args.seed)
    hot_paths = [f"/v1/events/{hot[k]}" for k in rng.integers(0, len(hot), args.reads)]
    asyncio.run(closed_loop(url, [f"/v1/events/{h}" for h in hot], args.clients, 60))
    ev = asyncio.run(closed_loop(url, hot_paths, args.clients, args.max_seconds))
    static = ["/static/magfuse.css"] * args.reads
    st = asyncio.run(closed_loop(url, static, args.clients, args.max_seconds))
    print(
        f"one-event read of 100 recent events (a duty screen; explanations cached), "
        f"{args.clients} clients, {len(ev)} requests: "
        f"p50 {pct(ev, 50):.1f} ms, p99 {pct(ev, 99):.1f} ms (target p99 <= 50 ms)"
    )
    print(
        f"static file, same stack and clients, {len(st)} requests: "
        f"p50 {pct(st, 50):.1f} ms, p99 {pct(st, 99):.1f} ms; "
        f"ratio event/static p50 {pct(ev, 50) / pct(st, 50):.1f}, "
        f"p99 {pct(ev, 99) / pct(st, 99):.1f}"
    )


def latency_phase(
    url: str, events: list[pd.DataFrame], headers: dict[str, str], cap_s: float
) -> None:
    """Submission to fused value readable, one 30-station event at a time."""
    lat: list[float] = []
    with httpx.Client(base_url=url, timeout=60) as c:
        deadline = time.monotonic() + cap_s
        for frame in events:
            if time.monotonic() > deadline:
                break
            eid = str(frame["event_id"].iloc[0])
            t = time.perf_counter()
            r = c.post("/v1/submissions", content=frame.to_csv(index=False), headers=headers)
            assert r.status_code == 201, r.text
            while True:
                got = c.get(f"/v1/events/{eid}")
                if got.status_code == 200 and got.json().get("recorded"):
                    break
            lat.append(time.perf_counter() - t)
    print(
        f"submission to fused value readable, 30-station events, {len(lat)} samples: "
        f"p50 {pct(lat, 50):.0f} ms, p99 {pct(lat, 99):.0f} ms (target p99 <= 1000 ms)"
    )


def rate_phase(url: str, texts: list[str], headers: dict[str, str]) -> float:
    """Seconds to submit every body from 4 concurrent clients."""

    async def feed() -> float:
        q = list(texts)
        async with httpx.AsyncClient(base_url=url, timeout=120) as c:

            async def w() -> None:
                while q:
                    r = await c.post("/v1/submissions", content=q.pop(), headers=headers)
                    assert r.status_code == 201, r.text

            t = time.perf_counter()
            await asyncio.gather(*(w() for _ in range(4)))
            return time.perf_counter() - t

    return asyncio.run(feed())


def ingest_seconds(work: Path, texts: list[str], store: Path) -> float:
    """Wall time of one ``magfuse ingest`` process over the bodies as files."""
    files = []
    for k, text in enumerate(texts):
        f = work / f"body{k:04d}.csv"
        f.write_text(text)
        files.append(str(f))
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    cmd = [sys.executable, "-c", "from fusion.cli.app import main; main()", "ingest", *files]
    t = time.perf_counter()
    subprocess.run([*cmd, "--store", str(store)], check=True, env=env, capture_output=True)
    return time.perf_counter() - t


def prepare_store(root: Path, args: argparse.Namespace) -> None:
    """Copy ``--store`` to ``root``, or build a synthetic one there."""
    if args.store is not None:
        shutil.copytree(args.store, root)
    else:
        t = time.perf_counter()
        _sibling("event_view_speed").ensure_store(root, args.rows, args.seed)
        print(f"built a {args.rows:,}-row store in {time.perf_counter() - t:.0f} s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--store", type=Path, help="existing store with an active ML model (copied)")
    ap.add_argument("--rows", type=int, default=1_000_000, help="rows of a built store")
    ap.add_argument("--clients", type=int, default=50)
    ap.add_argument("--reads", type=int, default=3000, help="requests per read phase")
    ap.add_argument("--latency-events", type=int, default=30, help="submit-to-read samples")
    ap.add_argument("--bodies", type=int, default=40, help="submissions in the rate phase")
    ap.add_argument("--max-seconds", type=float, default=60.0, help="cap of each phase")
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    sys.path.insert(0, str(REPO))
    from fusion.service.tokens import TokenBook
    from fusion.versions.model_registry import ModelRegistry
    from stations.store import StationMagnitudeStore

    work = Path(tempfile.mkdtemp(prefix="magfuse-service-bench-"))
    try:
        root = work / "store"
        prepare_store(root, args)
        clean = work / "clean"
        shutil.copytree(root, clean)  # for the ingest comparison
        n_rows = StationMagnitudeStore.open(root, create=False).summary().rows_current
        reg = ModelRegistry(root)
        stations = sorted({str(s) for s in reg.load_parameters(reg.active("ML")).station_ids})
        token = TokenBook(root).add("bench", "submit")
        headers = {"Authorization": f"Bearer {token}", "Content-Type": "text/csv"}
        t0 = pd.Timestamp("2030-01-01", tz="UTC")
        later = t0 + pd.Timedelta(days=30)
        bodies = synthetic_events(stations, args.bodies, 30, args.seed + 1, later)
        texts = [b.to_csv(index=False) for b in bodies]
        proc, url = start(root, work / "server.log")
        try:
            print(f"store: {n_rows:,} station magnitudes; server {url}")
            read_phase(url, root, args)
            events = synthetic_events(stations, args.latency_events, 30, args.seed, t0)
            latency_phase(url, events, headers, args.max_seconds)
            dt = rate_phase(url, texts, headers)
        finally:
            proc.terminate()
            proc.wait(timeout=30)
        server_side(work / "server.log")
        dt_ingest = ingest_seconds(work, texts, clean)
        rows = sum(len(b) for b in bodies)
        print(
            f"sustained submission: {rows:,} rows in {len(bodies)} submissions from 4 clients: "
            f"{rows / dt:,.0f} rows/s (each event fused on arrival); magfuse ingest of the same "
            f"files: {rows / dt_ingest:,.0f} rows/s (process start included); "
            f"ratio service/ingest {dt_ingest / dt:.2f}"
        )
    except BaseException:
        log = work / "server.log"
        if log.exists():
            print("server log (tail):\n" + log.read_text(errors="replace")[-3000:])
        raise
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
