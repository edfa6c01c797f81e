"""Identifiability checks of docs/model.md §3: components, anchors, bipartiteness (E12)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse
from scipy.sparse import csgraph

from fusion.model.connectivity import (
    co_observation_components,
    connectivity_report,
    signless_laplacian,
)
from tests.reference import estimator as ref


def _pair_events(edges: list[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
    """One two-station event per edge, rows sorted by event."""
    event = np.repeat(np.arange(len(edges)), 2)
    station = np.array(edges, dtype=np.int64).ravel()
    return event, station


@pytest.mark.parametrize("name", sorted(ref.E12_CASES))
def test_e12_signless_laplacian_rank(name: str) -> None:
    """E12: path rank 2 of 3, 4-cycle rank 3 of 4, triangle full rank (numpy.linalg.matrix_rank)."""
    edges, n, rank = ref.E12_CASES[name]
    event, station = _pair_events(edges)
    Q = signless_laplacian(event, station, n).toarray()
    assert np.linalg.matrix_rank(Q) == rank
    report = connectivity_report(event, station, len(edges), n)
    assert report.n_components == 1
    assert bool(report.bipartite[0]) == (rank < n)
    assert bool(report.sigma_identifiable.all()) == (rank == n)


def test_three_station_event_is_a_triangle() -> None:
    """An event with three stations is an odd cycle: σ identifiable (docs/model.md §3)."""
    event = np.zeros(3, dtype=np.int64)
    station = np.array([0, 1, 2])
    Q = signless_laplacian(event, station, 3).toarray()
    assert np.linalg.matrix_rank(Q) == 3
    assert not connectivity_report(event, station, 1, 3).bipartite[0]


def test_components_match_scipy_on_explicit_graph() -> None:
    """Star construction = components of the explicit co-observation graph (scipy.csgraph)."""
    rng = np.random.default_rng(2)
    K, N = 300, 400
    n_j = rng.integers(1, 5, size=N)
    event = np.repeat(np.arange(N), n_j)
    station = rng.integers(0, K, size=event.shape[0])
    labels, n = co_observation_components(event, station, N, K)
    # Explicit graph: every within-event pair is an edge.
    Q = signless_laplacian(event, station, K)
    adjacency = Q - sparse.diags(Q.diagonal())
    has_rows = np.bincount(station, minlength=K) > 0
    _, expected = csgraph.connected_components(adjacency, directed=False)
    assert np.all(labels[~has_rows] == -1)
    idx = np.flatnonzero(has_rows)
    # Same partition: equal labels iff equal expected labels.
    same = labels[idx][:, None] == labels[idx][None, :]
    same_expected = expected[idx][:, None] == expected[idx][None, :]
    assert np.array_equal(same, same_expected)
    assert n == np.unique(expected[idx]).shape[0]


def test_anchors_and_uncalibrated() -> None:
    """Unanchored components and stations without rows are uncalibrated (docs/model.md §3)."""
    # Component A: stations 0-1-2 (a triangle event); component B: 3-4 (pair events only).
    event = np.array([0, 0, 0, 1, 1, 2, 2])
    station = np.array([0, 1, 2, 3, 4, 3, 4])
    anchor = np.zeros(6, dtype=bool)
    anchor[1] = True
    rep = connectivity_report(event, station, 3, 6, anchor_stations=anchor)
    assert rep.n_components == 2
    assert rep.size.tolist() == [3, 2]
    assert rep.n_linking_events.tolist() == [1, 2]
    assert rep.bipartite.tolist() == [False, True]
    assert rep.anchored.tolist() == [True, False]
    assert rep.uncalibrated.tolist() == [False, False, False, True, True, True]
    assert rep.component[5] == -1
    # Anchoring by an event of component B.
    ev_anchor = np.array([False, True, False])
    rep2 = connectivity_report(event, station, 3, 6, anchor_events=ev_anchor)
    assert rep2.anchored.tolist() == [False, True]


def test_duplicate_channels_do_not_link_or_make_triangles() -> None:
    """Two rows of one station in an event are one cell: no edge, no odd cycle."""
    event = np.array([0, 0, 0, 1, 1])
    station = np.array([0, 0, 1, 1, 2])  # event 0: station 0 twice and station 1
    rep = connectivity_report(event, station, 2, 3)
    assert rep.n_components == 1
    assert rep.bipartite.tolist() == [True]  # path 0-1-2, no triangle
    assert np.linalg.matrix_rank(signless_laplacian(event, station, 3).toarray()) == 2
