"""Model versions: immutability, adopt / rollback, and crash safety of the active pointer."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from fusion.versions.model_registry import (
    ModelRegistry,
    parameters_from_frames,
    parameters_to_frames,
)
from stations.errors import ModelNotFoundError


def _params(shift: float = 0.0) -> StationParameters:
    nat = np.datetime64("NaT", "us")
    return StationParameters(
        magnitude_type="ML",
        unit_ids=np.array(["ZZ.A.", "ZZ.B.", "ZZ.B.@2025-06-01", "ZZ.C."], dtype=object),
        station_ids=np.array(["ZZ.A.", "ZZ.B.", "ZZ.B.", "ZZ.C."], dtype=object),
        epoch_start=np.array([nat, nat, np.datetime64("2025-06-01", "us"), nat]),
        epoch_end=np.array([nat, np.datetime64("2025-06-01", "us"), nat, nat]),
        bias=np.array([0.1, -0.2, 0.1, 0.0]) + shift,
        bias_var=np.array([1e-4, 2e-4, 3e-4, 4e-4]),
        sigma2=np.array([0.04, 0.05, 0.05, 0.09]),
        prior_dominated=np.array([False, False, True, False]),
        pairs=PairCovariance(np.array([0]), np.array([3]), np.array([0.02]), 4),
        tau_b2=0.04,
        s0_2=0.05,
    )


def test_parameters_round_trip_through_frames() -> None:
    p = _params()
    units, pairs = parameters_to_frames(p)
    q = parameters_from_frames("ML", units, pairs, tau_b2=p.tau_b2, s0_2=p.s0_2)
    np.testing.assert_array_equal(q.unit_ids, p.unit_ids)
    np.testing.assert_array_equal(q.epoch_start, p.epoch_start)
    np.testing.assert_array_equal(q.epoch_end, p.epoch_end)
    np.testing.assert_allclose(q.bias, p.bias)
    np.testing.assert_array_equal(q.pairs.partner, p.pairs.partner)
    np.testing.assert_allclose(q.pairs.c, p.pairs.c)


def test_save_adopt_rollback(tmp_path: Path) -> None:
    reg = ModelRegistry(tmp_path)
    with pytest.raises(ModelNotFoundError, match="no active ML model"):
        reg.active("ML")
    v1 = reg.save(_params(), {"window": "w1"}, {"stations": pd.DataFrame({"a": [1]})})
    v2 = reg.save(_params(0.05), {"window": "w2"})
    assert v1.version_id != v2.version_id
    assert [v.version_id for v in reg.versions("ML")] == sorted([v1.version_id, v2.version_id])
    reg.adopt(v1.version_id)
    reg.adopt(v2.version_id)
    assert reg.active_id("ML") == v2.version_id
    np.testing.assert_allclose(reg.load_parameters(reg.active("ML")).bias, _params(0.05).bias)
    assert reg.rollback("ML").version_id == v1.version_id
    assert reg.active_id("ML") == v1.version_id
    assert list(reg.load_table(v1, "stations")["a"]) == [1]
    with pytest.raises(ModelNotFoundError, match="no earlier ML model"):
        reg.rollback("ML")
    with pytest.raises(ModelNotFoundError, match="not found"):
        reg.get("ML-20250101T000000Z-deadbeef")


_ADOPT_LOOP = """
import sys
from fusion.versions.model_registry import ModelRegistry
reg = ModelRegistry(sys.argv[1])
a, b = sys.argv[2], sys.argv[3]
print("ready", flush=True)
while True:
    reg.adopt(a)
    reg.adopt(b)
"""


@pytest.mark.slow
def test_kill_during_adopt_leaves_one_active_version(tmp_path: Path) -> None:
    """SIGKILL at random moments of a tight adopt loop: the pointer is always whole and valid."""
    reg = ModelRegistry(tmp_path)
    v1 = reg.save(_params(), {"window": "w1"})
    v2 = reg.save(_params(0.05), {"window": "w2"})
    rng = np.random.default_rng(7)
    for _ in range(5):
        proc = subprocess.Popen(
            [sys.executable, "-c", _ADOPT_LOOP, str(tmp_path), v1.version_id, v2.version_id],
            stdout=subprocess.PIPE,
        )
        assert proc.stdout is not None
        assert proc.stdout.readline().strip() == b"ready"
        time.sleep(float(rng.uniform(0.05, 0.3)))
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        active = json.loads((tmp_path / "models" / "ML" / "active.json").read_text())
        assert active["version"] in (v1.version_id, v2.version_id)
        assert ModelRegistry(tmp_path).active("ML").version_id == active["version"]
    before = ModelRegistry(tmp_path).active_id("ML")
    previous = ModelRegistry(tmp_path).rollback("ML").version_id
    assert previous != before


def test_damaged_model_table_is_refused_on_load_naming_the_file(tmp_path: Path) -> None:
    from stations.errors import StoreCorruptError

    reg = ModelRegistry(tmp_path)
    v = reg.save(_params(), {"window": "w1"})
    units = v.path / "units.parquet"
    raw = bytearray(units.read_bytes())
    mid = len(raw) // 2
    raw[mid : mid + 8] = bytes(8)
    units.write_bytes(bytes(raw))
    with pytest.raises(StoreCorruptError, match=rf"^{units}: damaged"):
        reg.load_parameters(v.version_id)
    checked, problems = reg.verify()
    assert checked >= 3 and [p.path.rsplit("/", 1)[-1] for p in problems] == ["units.parquet"]
