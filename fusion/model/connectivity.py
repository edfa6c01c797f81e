"""Identifiability of the station model: components, anchors and odd cycles (docs/model.md §3).

**Level.** In each connected component of the station–event graph (events with at least two
distinct stations) the likelihood is unchanged by M_j → M_j + δ, b_i → b_i − δ, so every
component needs one anchor; stations in a component without one are reported *uncalibrated*.

**Variances.** Write G for the station co-observation graph (an edge k–l when k and l share an
event). Without flagged pairs the normal matrix of the pair-difference variances
E[(m_kj − m_lj − b_k + b_l)²] = σ_k² + σ_l² is the signless Laplacian Q = D_G + A_G, which is
nonsingular iff every component of G holds an odd cycle, i.e. is not bipartite [derived; graph
fact from memory] (worked example E12: path 0–1–2 rank 2 of 3, 4-cycle rank 3 of 4, triangle
full rank). An event with three or more distinct stations is a triangle, so only components
whose events all have exactly two stations can be bipartite.

Everything is O(nnz): components come from :func:`scipy.sparse.csgraph.connected_components` on
a star per event (each station linked to the event's first station: at most nnz edges, never
the Σ n_j² station pairs); bipartiteness of the
two-station part comes from the components of its *double cover* (each station k split into
k⁺, k⁻, an edge k–l into k⁺–l⁻ and k⁻–l⁺): a connected graph is bipartite iff k⁺ and k⁻ fall in
different components of the cover [derived; standard graph fact].
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.sparse import csgraph

__all__ = [
    "Connectivity",
    "co_observation_components",
    "connectivity_report",
    "signless_laplacian",
]


@dataclass(frozen=True, slots=True, eq=False)
class Connectivity:
    """Components of the co-observation graph and what each can identify.

    Attributes
    ----------
    component : ndarray of int, shape (K,)
        Component label of each station; a station sharing no event with another is a
        component of its own (size 1); -1 for a station without rows.
    n_components : int
        Number of labelled components (stations with label -1 excluded).
    size : ndarray of int, shape (n_components,)
        Stations per component.
    n_linking_events : ndarray of int, shape (n_components,)
        Events with at least two distinct stations in each component.
    bipartite : ndarray of bool, shape (n_components,)
        True if the co-observation graph of the component has no odd cycle: only sums of
        variances along its edges are identifiable (docs/model.md §3).
    anchored : ndarray of bool, shape (n_components,)
        True if the component holds an anchor (reference station or reference event).
    uncalibrated : ndarray of bool, shape (K,)
        Station in an unanchored component, or without rows.
    sigma_identifiable : ndarray of bool, shape (K,)
        Station in a non-bipartite component.
    """

    component: NDArray[np.int64]
    n_components: int
    size: NDArray[np.int64]
    n_linking_events: NDArray[np.int64]
    bipartite: NDArray[np.bool_]
    anchored: NDArray[np.bool_]
    uncalibrated: NDArray[np.bool_]
    sigma_identifiable: NDArray[np.bool_]


def _distinct_cells(
    event: NDArray[np.int64], station: NDArray[np.int64], n_stations: int
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """(event, station) sorted by event then station, duplicate cells (two channels) removed.

    One sort of an int64 key (``np.unique`` is avoided: its hash path is slow on 1e7 keys).
    """
    key = np.sort(event.astype(np.int64) * n_stations + station)
    if key.shape[0]:
        key = key[np.concatenate([[True], key[1:] != key[:-1]])]
    return key // n_stations, key % n_stations


def _components_from_cells(
    ev: NDArray[np.int64], st: NDArray[np.int64], n_stations: int
) -> tuple[NDArray[np.int64], int]:
    """Components of stations linked through events, from distinct cells sorted by event."""
    labels = np.full(n_stations, -1, dtype=np.int64)
    if ev.shape[0] == 0:
        return labels, 0
    # Star edges: every station of an event is linked to the event's first station.
    first = np.concatenate([[True], ev[1:] != ev[:-1]])
    hub = st[np.flatnonzero(first)[np.cumsum(first) - 1]]
    edge = hub * n_stations + st
    if n_stations * n_stations <= 50_000_000:
        used = np.flatnonzero(np.bincount(edge, minlength=n_stations * n_stations))
    else:
        used = np.sort(edge)
        used = used[np.concatenate([[True], used[1:] != used[:-1]])]
    src, dst = used // n_stations, used % n_stations
    graph = sparse.coo_matrix(
        (np.ones(src.shape[0], dtype=np.int8), (src, dst)), shape=(n_stations, n_stations)
    ).tocsr()
    _, raw = csgraph.connected_components(graph, directed=False)
    linked = np.zeros(n_stations, dtype=bool)
    linked[st] = True
    # Renumber the components of stations with rows 0..n-1 in order of their first station.
    idx = np.flatnonzero(linked)
    comp_first = np.full(n_stations, n_stations, dtype=np.int64)
    np.minimum.at(comp_first, raw[idx], idx)
    present = np.flatnonzero(comp_first < n_stations)
    order = np.argsort(comp_first[present])
    new = np.full(n_stations, -1, dtype=np.int64)
    new[present[order]] = np.arange(present.shape[0])
    labels[idx] = new[raw[idx]]
    return labels, int(present.shape[0])


def co_observation_components(
    event: NDArray[np.int64], station: NDArray[np.int64], n_events: int, n_stations: int
) -> tuple[NDArray[np.int64], int]:
    """Component label per station of the graph linking stations through shared events.

    Parameters
    ----------
    event, station : ndarray of int, shape (nnz,)
        Row codes (any order; duplicate cells allowed).
    n_events, n_stations : int
        Sizes of the event and station tables.

    Returns
    -------
    labels : ndarray of int, shape (K,)
        0..n-1, ordered by first station; a station with rows that shares no event with
        another station is a component of its own; -1 for stations without rows.
    n : int
        Number of components.

    Notes
    -----
    Each event links its stations to its first station (a star), so the graph has at most
    nnz edges, deduplicated by one ``bincount`` over K² keys (K <= ~7000) or a sort.
    """
    del n_events
    ev, st = _distinct_cells(event, station, n_stations)
    return _components_from_cells(ev, st, n_stations)


def connectivity_report(
    event: NDArray[np.int64],
    station: NDArray[np.int64],
    n_events: int,
    n_stations: int,
    *,
    anchor_stations: NDArray[np.bool_] | None = None,
    anchor_events: NDArray[np.bool_] | None = None,
) -> Connectivity:
    """Nightly connectivity check of docs/model.md §3: components, anchors, bipartiteness.

    Parameters
    ----------
    event, station : ndarray of int, shape (nnz,)
        Row codes of the readings the fit uses.
    n_events, n_stations : int
        Sizes of the event and station tables.
    anchor_stations : ndarray of bool, shape (K,), optional
        Stations carrying an anchor (the reference set, A1/A2).
    anchor_events : ndarray of bool, shape (N,), optional
        Events carrying an anchor (reference events, A3); they anchor the components of every
        station that observed them.

    Returns
    -------
    Connectivity
    """
    ev, st = _distinct_cells(event, station, n_stations)
    labels, n_comp = _components_from_cells(ev, st, n_stations)
    n_distinct = np.bincount(ev, minlength=n_events)
    linked_rows = n_distinct[ev] >= 2
    comp_row = labels[st]

    size = np.bincount(labels[labels >= 0], minlength=n_comp).astype(np.int64)
    # Linking events per component: count each event once, at its first linked row.
    first_row = linked_rows & np.concatenate([[True], ev[1:] != ev[:-1]])
    n_link = np.bincount(comp_row[first_row], minlength=n_comp).astype(np.int64)

    # Odd cycles: any event with >= 3 distinct stations is a triangle.
    has_triangle = np.zeros(n_comp, dtype=bool)
    tri_rows = n_distinct[ev] >= 3
    has_triangle[comp_row[tri_rows]] = True
    bipartite = ~has_triangle
    cand = np.flatnonzero(bipartite)
    if cand.shape[0]:
        bipartite[cand] = _two_station_bipartite(ev, st, n_distinct, labels, n_stations, cand)

    anchored = np.zeros(n_comp, dtype=bool)
    if anchor_stations is not None:
        hit = labels[np.asarray(anchor_stations, dtype=bool)]
        anchored[hit[hit >= 0]] = True
    if anchor_events is not None:
        ae = np.asarray(anchor_events, dtype=bool)
        hit = labels[st[ae[ev]]]
        anchored[hit[hit >= 0]] = True
    comp_ok = labels >= 0
    uncalibrated = np.ones(n_stations, dtype=bool)
    uncalibrated[comp_ok] = ~anchored[labels[comp_ok]]
    sigma_ok = np.zeros(n_stations, dtype=bool)
    sigma_ok[comp_ok] = ~bipartite[labels[comp_ok]]
    return Connectivity(
        component=labels,
        n_components=n_comp,
        size=size,
        n_linking_events=n_link,
        bipartite=bipartite,
        anchored=anchored,
        uncalibrated=uncalibrated,
        sigma_identifiable=sigma_ok,
    )


def _two_station_bipartite(
    ev: NDArray[np.int64],
    st: NDArray[np.int64],
    n_distinct: NDArray[np.int64],
    labels: NDArray[np.int64],
    n_stations: int,
    candidates: NDArray[np.int64],
) -> NDArray[np.bool_]:
    """Bipartiteness of components whose events all hold exactly two distinct stations."""
    rows = n_distinct[ev] == 2
    s2 = st[rows]
    # Rows are sorted by (event, station): each event contributes rows 2t, 2t+1.
    k, l = s2[0::2], s2[1::2]
    in_cand = np.isin(labels[k], candidates)
    k, l = k[in_cand], l[in_cand]
    n2 = 2 * n_stations
    src = np.concatenate([k, k + n_stations])
    dst = np.concatenate([l + n_stations, l])
    cover = sparse.coo_matrix(
        (np.ones(src.shape[0], dtype=np.int8), (src, dst)), shape=(n2, n2)
    ).tocsr()
    _, cl = csgraph.connected_components(cover, directed=False)
    # One representative station per candidate component.
    rep = np.full(labels.max(initial=-1) + 1, -1, dtype=np.int64)
    valid = np.flatnonzero(labels >= 0)
    rep[labels[valid]] = valid
    r = rep[candidates]
    return np.asarray(cl[r] != cl[r + n_stations], dtype=bool)


def signless_laplacian(
    event: NDArray[np.int64], station: NDArray[np.int64], n_stations: int
) -> sparse.csr_matrix:
    """Q = D_G + A_G of the co-observation graph, normal matrix of σ² (docs/model.md §3.3).

    Each co-observing pair (k, l) counts once per shared event, i.e. Q = Σ_events Σ_{k<l}
    (e_k + e_l)(e_k + e_l)'. Builds the Σ n_j² within-event pairs: meant for diagnostics and
    tests on small networks, not for the nightly fit.

    Parameters
    ----------
    event, station : ndarray of int, shape (nnz,)
        Row codes; duplicate cells are collapsed.
    n_stations : int
        K.

    Returns
    -------
    scipy.sparse.csr_matrix, shape (K, K)
    """
    ev, st = _distinct_cells(event, station, n_stations)
    counts = np.bincount(ev)
    start = np.concatenate([[0], np.cumsum(counts)[:-1]])
    n_ev = counts[ev]
    # All ordered within-event row pairs (p, q), p != q: repeat each row n_j times.
    rep = np.repeat(np.arange(ev.shape[0]), n_ev)
    offset = np.arange(rep.shape[0]) - np.repeat(np.cumsum(n_ev) - n_ev, n_ev)
    other = start[ev[rep]] + offset
    keep = other != rep
    p, q = st[rep[keep]], st[other[keep]]
    adjacency = sparse.coo_matrix(
        (np.ones(p.shape[0]), (p, q)), shape=(n_stations, n_stations)
    ).tocsr()
    degree = np.asarray(adjacency.sum(axis=1)).ravel()
    return (adjacency + sparse.diags(degree)).tocsr()
