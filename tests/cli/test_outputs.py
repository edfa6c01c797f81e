"""What every command prints around its result: the advisory, help texts a reader can use, and
options refused at the command line with one line instead of a late, misleading answer."""

from __future__ import annotations

import re
import warnings
from pathlib import Path

import pytest

from fusion.advisory import ADVISORY
from fusion.cli.app import app
from tests.cli.conftest import LearnedStore, copy_store, demo_slice, invoke

#: Every command of ``magfuse --help`` (the demo is checked in tests/cli/test_demo.py: it
#: takes a minute).
COMMANDS = tuple(c.name for c in app.registered_commands)


#: The commands of the README's table, each tried with arguments that make it succeed.
KNOWN = frozenset(
    {
        "ingest",
        "store",
        "compute",
        "learn",
        "models",
        "adopt",
        "rollback",
        "diff",
        "fuse",
        "event",
        "finalize",
        "export",
        "report",
        "nightly",
    }
)


def _args(name: str, ls: LearnedStore, root: Path, tmp: Path) -> list[object]:
    """Arguments that make ``magfuse NAME`` succeed on a copy of the learned store (a command
    not listed here is tried with ``--store`` and ``--config`` alone)."""
    event = "qv2025-00010"
    common: list[object] = ["--store", root, "--config", ls.config]
    by_name: dict[str, list[object]] = {
        "ingest": [demo_slice(tmp / "apr.csv", "2025-04-01", "2025-04-08")],
        "store": [],
        "compute": ["--type", "ML"],
        "learn": [],
        "models": [],
        "adopt": [ls.v2],
        "rollback": [],
        "diff": [ls.v2],
        "fuse": [],
        "event": [event],
        "finalize": ["--before", "2025-01-15"],
        "export": ["magnitudes", "--out", tmp / "m.csv"],
        "report": ["--out", tmp / "report"],
        "nightly": ["--inbox", _inbox(tmp)],
    }
    assert set(by_name) == KNOWN
    return [*by_name.get(name, []), *common]


def _inbox(tmp: Path) -> Path:
    inbox = tmp / "inbox"
    demo_slice(inbox / "apr.csv", "2025-04-01", "2025-04-08")
    return inbox


@pytest.mark.slow
def test_every_command_prints_the_advisory(learned_store: LearnedStore, tmp_path: Path) -> None:
    """README: 'Every command, export and report says so' (models and finalize did not)."""
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "the-store")
    invoke("adopt", ls.v1, "--store", root)  # rollback needs an earlier active version
    missing, untried = [], []
    for name in COMMANDS:
        if name in ("demo", "serve"):  # serve runs until stopped: tests/service/test_server.py
            continue
        work = tmp_path / f"work-{name}"
        work.mkdir()
        if name == "rollback":
            invoke("adopt", ls.v2, "--store", root, "--config", ls.config)
        res = invoke(name, *_args(name, ls, root, work))
        if res.exit_code not in (0, 3):
            assert name not in KNOWN, (name, res.stdout, res.stderr)
            untried.append(f"{name}: {res.stderr.strip()}")  # a newer command: list its args
            continue
        if ADVISORY not in res.stdout + res.stderr:
            missing.append(name)
    assert missing == []
    if untried:
        warnings.warn(f"advisory not checked for: {untried}", stacklevel=1)
    res = invoke("models", "--json", "--store", root)
    assert res.stderr == ADVISORY + "\n"  # on stderr: the JSON stays machine-readable


# -- help texts -----------------------------------------------------------------------------------

#: What a reader of --help should never see: Python type names, braces, reST/Markdown markup.
FORBIDDEN_IN_HELP = re.compile(r"<[^>]*>|[{}]|``|\*\*|list\[|:class:|:func:|:mod:|\bstr\b|\bPath\b")


def _help(*command: str) -> str:
    res = invoke(*command, "--help")
    assert res.exit_code == 0, res.stderr
    return res.stdout


@pytest.mark.parametrize("command", [(), *((name,) for name in COMMANDS)])
def test_help_shows_no_type_names_or_markup(command: tuple[str, ...]) -> None:
    text = _help(*command)
    assert FORBIDDEN_IN_HELP.findall(text) == [], text


def test_format_and_type_options_list_their_values() -> None:
    from stations.readers import supported_formats
    from stations.schema import MagnitudeType

    ingest = " ".join(_help("ingest").split())
    for fmt in supported_formats():
        assert fmt in ingest.split("--format FORMAT", 1)[1].split("--compute", 1)[0], fmt
    export = " ".join(_help("export").split())
    assert "--format csv|parquet|quakeml" in export
    for name in ("learn", "fuse", "export", "report"):
        text = " ".join(_help(name).split())
        options = text.split("--type TYPE", 1)[1]
        for m in MagnitudeType:
            assert f" {m.value}," in options or f" {m.value} (" in options, (name, m.value)


def test_report_stations_option_says_it_draws_the_map() -> None:
    text = " ".join(_help("report").split())
    stations = text.split("--stations FILE", 1)[1].split("--store", 1)[0]
    assert "map" in stations and "distances" not in stations


# -- options checked by the settings' rules -------------------------------------------------------


@pytest.mark.parametrize(
    ("command", "option", "value", "rule"),
    [
        ("diff", "--top", "0", "greater than or equal to 1"),
        ("diff", "--top", "-3", "greater than or equal to 1"),
        ("diff", "--days", "0", "greater than 0"),
        ("learn", "--window", "-1", "greater than 0"),
        ("learn", "--half-life", "0", "greater than 0"),
    ],
)
def test_out_of_range_option_is_one_line_naming_it(
    learned_store: LearnedStore, command: str, option: str, value: str, rule: str
) -> None:
    """The same range as the configuration key the option overrides (fusion.settings)."""
    ls = learned_store
    res = invoke(command, option, value, "--store", ls.root, "--config", ls.config)
    assert res.exit_code == 1, res.stdout
    assert res.stdout == ""
    (line,) = res.stderr.splitlines()
    assert line.startswith(f"Error: {option} ") and rule in line, line


# -- names a reader can read ----------------------------------------------------------------------


def test_event_table_names_the_correction_column_in_full(learned_store: LearnedStore) -> None:
    """'corr' read as correction or correlation; the header says 'correction'."""
    ls = learned_store
    res = invoke("event", "qv2025-00010", "--store", ls.root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr
    (header,) = [line for line in res.stdout.splitlines() if line.startswith("station ")]
    assert header.split()[:4] == ["station", "mag", "correction", "corrected"]


def test_report_pair_table_uses_words_not_design_symbols() -> None:
    import numpy as np
    import pandas as pd

    from fusion.report.writer import _pair_rows

    pairs = pd.DataFrame(
        {
            "station_k": ["ZZ.A."],
            "station_l": ["ZZ.B."],
            "n_shared": [100],
            "rho_hat": [0.5],
            "rho_ci_low": [0.3],
            "rho_ci_high": [0.7],
            "statistic": [5.0],
            "p_value": [1e-6],
            "q_value": [1e-5],
            "flagged": [True],
        }
    )
    html = _pair_rows(pairs, np.arange(1))
    for symbol in ("station k", "station l", "ρ̂", ">T<", "rho_hat", "c_hat", "T_self"):
        assert symbol not in html, symbol
    assert "error correlation" in html


def test_counts_agree_with_their_noun(learned_store: LearnedStore, tmp_path: Path) -> None:
    """'1 network magnitude', never '1 network magnitudes' (fusion.wording.count)."""
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "copy")
    res = invoke("finalize", "qv2025-00010", "--store", root, "--config", ls.config)
    assert (res.exit_code, res.stdout) == (0, "ML: 1 network magnitude marked final\n")


def test_learn_csv_tables_are_the_documented_exports(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    """learn --csv wrote the learner's raw tables (integer codes k, l, symbols rho_hat);
    it now writes what 'magfuse export' writes, each with its README."""
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "copy")
    out = tmp_path / "tables"
    res = invoke("learn", "--csv", out, "--store", root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr
    for name in ("stations", "pairs", "epochs"):
        (path,) = out.glob(f"*-{name}.csv")
        header = path.read_text(encoding="utf-8").splitlines()[0].replace('"', "").split(",")
        assert not {"k", "l", "station", "rho_hat", "c_hat"} & set(header), (name, header)
        assert ADVISORY in Path(f"{path}.README.txt").read_text(encoding="utf-8")


def test_text_output_cites_published_docs_not_design_notes(learned_store: LearnedStore) -> None:
    """Readers have docs/, not the development design notes ('DESIGN §11')."""
    ls = learned_store
    res = invoke("diff", ls.v2, "--store", ls.root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr
    assert "non-detections (censored likelihood" in res.stdout  # the section that cited it
    assert "DESIGN" not in res.stdout and "§" not in res.stdout
