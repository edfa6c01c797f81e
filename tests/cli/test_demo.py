"""``magfuse demo``: the whole job on the invented demo network, scored against its known truth.

Outside check: the demo's truth tables (``sample_events/demo_truth_*.csv``, written by the seeded
generator beside the data) give every event's true magnitude; the demo scores the fused network
magnitude, the plain mean and the median against it, and an oracle that fuses with the true
station parameters (docs/simulation.md).
"""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import Result

import sample_events
from fusion.advisory import ADVISORY
from tests.cli.conftest import VERSION_RE, invoke

_ROW = re.compile(
    r"(fused|plain mean|median|oracle)\s+([\d,]+)\s+(\d+\.\d{3})\s+(\d+\.\d{3})\s+"
    r"([+-]\d+\.\d{3})(?: (\d\.\d{3}))?"
)


#: A number of four or more digits not written with thousands separators (dates, times, ids
#: and version ids excluded by their neighbouring characters).
_BARE_COUNT = re.compile(r"(?<![\w.:/,~+-])\d{4,}(?![\w.:/,-])")

#: Words of the score table's header line.
HEADER = [
    "method",
    "events",
    "RMSE",
    "raw",
    "RMSE",
    "offset",
    "coverage",
    "of",
    "the",
    "68",
    "%",
    "interval",
]


def _scores(lines: list[str]) -> dict[str, tuple[int, float]]:
    """The printed score table (step 5): method -> (events, RMSE after the level offset)."""
    head = lines.index(
        "errors against the true magnitudes, after removing one common level offset per method"
    )
    assert lines[head + 1].split() == HEADER
    out = {}
    for line in lines[head + 2 : head + 6]:
        m = _ROW.fullmatch(line.rstrip())
        assert m is not None, line
        out[m[1]] = (int(m[2].replace(",", "")), float(m[3]))
    return out


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Result, Path]:
    """One ``magfuse demo`` run (about a minute) and its work folder."""
    tmp_path = tmp_path_factory.mktemp("demo-run")
    res = invoke("demo", "--workdir", tmp_path / "demo")
    assert res.exit_code == 0, res.stdout + res.stderr
    return res, tmp_path


@pytest.mark.slow
def test_demo_beats_the_plain_mean_and_nearly_matches_the_oracle(
    demo: tuple[Result, Path],
) -> None:
    res, tmp_path = demo
    lines = res.stdout.splitlines()
    steps = [line for line in lines if line.startswith("== ")]
    assert [s[:5] for s in steps] == ["== 1.", "== 2.", "== 3.", "== 4.", "== 5.", "== 6."]
    assert lines[-1] == ADVISORY

    scores = _scores(lines)
    truth = pd.read_csv(sample_events.demo_truth_paths().events)
    assert {n for n, _ in scores.values()} == {len(truth)}  # every true event, every method
    rmse = {method: r for method, (_, r) in scores.items()}
    print(f"\nRMSE against the true magnitudes: {rmse}")
    fused = rmse["fused"]
    assert fused < rmse["plain mean"]
    assert fused < rmse["median"]
    # Within 5 % of the oracle. The printed ratio (3 decimals) agrees with the table's RMSEs up
    # to rounding: each printed value is within 0.0005 of its exact one, so f/o moves by at
    # most 0.0005 (1 + f/o) / o, and the ratio's own rounding adds 0.0005.
    (ratio_line,) = [line for line in lines if line.startswith("fused RMSE / oracle RMSE = ")]
    ratio = float(ratio_line.split("=")[1].split()[0])
    assert ratio <= 1.05
    oracle = rmse["oracle"]
    assert abs(ratio - fused / oracle) <= 0.0005 * (1 + ratio) / oracle + 0.0005

    report = Path(next(line for line in lines if line.startswith("report   ")).split()[1])
    assert report.is_file() and report.stat().st_size > 0
    assert ADVISORY in report.read_text(encoding="utf-8")
    (adopted,) = re.findall(rf"the demo adopts ({VERSION_RE}) by hand", res.stdout)
    models = invoke("models", "--store", tmp_path / "demo" / "store")
    assert f"* {adopted}" in models.stdout


@pytest.mark.slow
def test_demo_prints_its_store_and_next_commands_that_work_on_it(
    demo: tuple[Result, Path],
) -> None:
    """After the demo, 'magfuse store' without --store looks at the default store; the demo
    says where its own store is and prints commands that work on it as printed."""
    res, tmp_path = demo
    lines = res.stdout.splitlines()
    store = tmp_path / "demo" / "store"
    assert f"the demo's store is {store}; try on it:" in lines
    tries = [line.split("#")[0].split() for line in lines if line.startswith("  magfuse ")]
    assert [t[1] for t in tries] == ["store", "models", "event", "export", "report"]
    for words in tries[:3]:  # the quick ones, exactly as printed (the path needs no quoting)
        assert words[-2:] == ["--store", str(store)]
        out = invoke(*words[1:])
        assert out.exit_code == 0, out.stderr
        assert "no store" not in out.stdout + out.stderr
        # human text: counts from 1,000 up with thousands separators (models: 2,369 events)
        assert _BARE_COUNT.findall(out.stdout) == [], (words[1], out.stdout)


@pytest.mark.slow
def test_demo_counts_read_as_english(demo: tuple[Result, Path]) -> None:
    """Plurals agree with their count ('1 bias step') and counts from 1,000 up carry
    thousands separators, in the demo's text as in the other commands' text."""
    res, _ = demo
    text = res.stdout
    assert not re.search(r"(?<![\d,.])1 (bias steps|events|stations|correlated pairs)\b", text)
    bare = _BARE_COUNT.findall(text)
    assert bare == [], bare
    assert re.search(r"\b2,390\b", text)  # the demo's 2,390 events in the score table
