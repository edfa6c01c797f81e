"""Anchors (docs/model.md §3.2): reference-events loader, unit weights, constraints, continuity."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fusion.model.anchors import (
    Anchor,
    AnchorKind,
    ReferenceEvents,
    level_constraints,
    read_reference_events,
    recentre_median,
    reference_event_priors,
    reference_unit_weights,
)
from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from stations.errors import ConfigError, MalformedFileError


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "reference_events.csv"
    p.write_text(text, encoding="utf-8")
    return p


def test_read_reference_events(tmp_path: Path) -> None:
    p = _write(tmp_path, "event_id,magnitude,uncertainty\nev1,4.2,\nev2, 3.10 ,0.1\n")
    ref = read_reference_events(p)
    assert ref.event_id.tolist() == ["ev1", "ev2"]
    assert ref.magnitude.tolist() == [4.2, 3.1]
    assert ref.uncertainty.tolist() == [0.0, 0.1]
    p2 = _write(tmp_path, "magnitude,event_id\n5.0,a\n")  # column order free, no uncertainty
    assert read_reference_events(p2).uncertainty.tolist() == [0.0]


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("event,magnitude\na,1\n", r"line 1: column 'event_id' is missing"),
        ("event_id,magnitude\na,x\n", r"line 2: magnitude 'x' is not a number"),
        ("event_id,magnitude\na,1\na,2\n", r"line 3: event 'a' is listed twice"),
        ("event_id,magnitude,uncertainty\na,1,-0.1\n", r"line 2: uncertainty -0.1 is negative"),
        ("event_id,magnitude\n,1\n", r"line 2: empty event_id"),
        ("event_id,magnitude\n", r"no reference events"),
        ("event_id,magnitude\na,inf\n", r"line 2: magnitude 'inf' is not finite"),
    ],
)
def test_read_reference_events_errors(tmp_path: Path, text: str, message: str) -> None:
    """Bad input: a one-line error naming file, line and fix (docs/conventions.md item 17)."""
    p = _write(tmp_path, text)
    with pytest.raises(MalformedFileError, match=message) as info:
        read_reference_events(p)
    assert str(p) in str(info.value)
    assert "\n" not in str(info.value)


def test_read_reference_events_missing_file(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError):
        read_reference_events(tmp_path / "nope.csv")


def test_anchor_validation() -> None:
    with pytest.raises(ConfigError, match="must be one of"):
        Anchor(kind="nonsense")  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match="reference events"):
        Anchor(kind=AnchorKind.REFERENCE_EVENTS)
    with pytest.raises(ConfigError, match="mean_magnitude"):
        Anchor(kind=AnchorKind.MEAN_MAGNITUDE)
    with pytest.raises(ConfigError, match="one weight per reference station"):
        Anchor(reference_stations=("A.B.",), reference_weights=(1.0, 2.0))
    assert Anchor(kind="median").kind is AnchorKind.MEDIAN  # type: ignore[arg-type]


def test_reference_weights_shared_among_epochs() -> None:
    """A reference station split into epochs shares its weight by Σγ (module docstring)."""
    anchor = Anchor(reference_stations=("XX.A.", "XX.B."), reference_weights=(1.0, 3.0))
    unit_station = np.array(["XX.A.", "XX.A.", "XX.B.", "XX.C."])
    weight_sum = np.array([30.0, 10.0, 50.0, 80.0])
    w = reference_unit_weights(anchor, unit_station, weight_sum)
    assert w.sum() == pytest.approx(1.0)
    assert w.tolist() == pytest.approx([0.25 * 0.75, 0.25 * 0.25, 0.75, 0.0])
    everyone = reference_unit_weights(Anchor(), unit_station, weight_sum)
    assert everyone.tolist() == pytest.approx([1 / 3 * 0.75, 1 / 3 * 0.25, 1 / 3, 1 / 3])


def _constraints(anchor: Anchor, component: np.ndarray, **kw: object):  # type: ignore[no-untyped-def]
    K = component.shape[0]
    units = np.array([f"XX.S{i}." for i in range(K)], dtype=object)
    return level_constraints(
        anchor,
        unit_ids=units,
        unit_station=units,
        weight_sum=np.ones(K),
        component=component,
        n_components=int(component.max()) + 1,
        event_ids=np.array(["e0", "e1", "e2"], dtype=object),
        event_in_component=np.array([0, 0, 1]),
        **kw,  # type: ignore[arg-type]
    )


def test_reference_set_constraint_and_fallback() -> None:
    """A1 in the component holding R; the other component gets the fallback mean = μ0."""
    comp = np.array([0, 0, 0, 1, 1])
    cons = _constraints(Anchor(reference_stations=("XX.S0.", "XX.S1."), value=0.1), comp)
    assert cons.component_anchored.tolist() == [True, False]
    assert cons.n_constraints == 2
    C = np.zeros((5, 2))
    C[np.arange(5), cons.group] = cons.weight
    b = np.array([0.0, 0.2, -1.0, 0.3, -0.1])  # mean over R = 0.1; mean of comp 1 = 0.1
    assert np.allclose(C.T @ b, cons.target)
    assert cons.prior_mean == pytest.approx(0.1)


def test_median_recentring() -> None:
    """A2: median over R of b equals the level after re-centring; relative b unchanged."""
    comp = np.zeros(5, dtype=np.int64)
    cons = _constraints(Anchor(kind=AnchorKind.MEDIAN), comp)
    b = np.array([0.3, 0.1, 0.7, -0.2, 0.4])
    out = recentre_median(b, cons, comp)
    assert np.median(out) == pytest.approx(0.0, abs=1e-15)
    assert np.allclose(np.diff(out), np.diff(b))


def test_reference_events_priors() -> None:
    ref = ReferenceEvents(
        event_id=np.array(["e2", "e0"]),
        magnitude=np.array([3.0, 4.0]),
        uncertainty=np.array([0.0, 0.2]),
    )
    anchor = Anchor(kind=AnchorKind.REFERENCE_EVENTS, reference_events=ref)
    mean, prec = reference_event_priors(anchor, np.array(["e0", "e1", "e2"]))
    assert np.isnan(mean[1]) and prec[1] == 0.0
    assert mean[0] == 4.0 and prec[0] == pytest.approx(25.0)
    assert mean[2] == 3.0 and np.isinf(prec[2])
    cons = _constraints(anchor, np.array([0, 0, 1, 1]))
    assert cons.component_anchored.tolist() == [True, True]
    assert cons.n_constraints == 0


def _previous(units: list[str], bias: list[float]) -> StationParameters:
    K = len(units)
    nat = np.full(K, np.datetime64("NaT", "us"))
    return StationParameters(
        magnitude_type="ML",
        unit_ids=np.array(units, dtype=object),
        station_ids=np.array(units, dtype=object),
        epoch_start=nat,
        epoch_end=nat.copy(),
        bias=np.array(bias),
        bias_var=np.full(K, 1e-4),
        sigma2=np.full(K, 0.04),
        prior_dominated=np.zeros(K, dtype=bool),
        pairs=PairCovariance.empty(K),
        tau_b2=0.04,
        s0_2=0.04,
    )


def test_continuity_over_the_overlap() -> None:
    """docs/rolling-fit.md §4: when R changes, the level comes from the reference units in both.

    Previous model: S0, S1, S9 (S9 retired). New fit: S0, S1, S2. The constraint ties the
    weighted mean of b − b_prev over the overlap {S0, S1} to 0.
    """
    prev = _previous(["XX.S0.", "XX.S1.", "XX.S9."], [0.10, 0.30, -0.50])
    comp = np.zeros(3, dtype=np.int64)
    cons = _constraints(Anchor(previous=prev), comp)
    assert cons.continuity
    C = np.zeros((3, 1))
    C[np.arange(3), np.maximum(cons.group, 0)] = cons.weight
    # Any b with mean(b0 − 0.1, b1 − 0.3) = 0 satisfies it, whatever b2.
    b = np.array([0.15, 0.25, 7.0])
    assert np.allclose(C.T @ b, cons.target)
    assert cons.weight[2] == 0.0
    assert cons.prior_mean == pytest.approx(0.2)
