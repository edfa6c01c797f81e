"""Correlated-pair detection, global independence test, difference tetrads (docs/pairs.md)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest
from numpy.typing import NDArray
from scipy import stats

from fusion.model.pair_tests import (
    PairStatus,
    _leave_two_out,
    _pair_index,
    detect_correlated_pairs,
    difference_tetrads,
    fisher_z_interval,
    global_independence_test,
    min_shared_for_power,
)
from fusion.model.simulation import SimulatedNetwork, SimulationConfig, simulate_network
from fusion.network.event_gls import event_gls
from fusion.network.gls_blocks import PairCovariance
from fusion.observations import ObservationSet
from stations.errors import ConfigError, DegenerateDataWarning
from tests.reference.pairs import (
    E11_N_ALPHA_0001,
    E11_N_ALPHA_005,
    E11_RHO,
    e4_all_station,
    e4_leave_two_out,
)


def _obs_from_arrays(
    event: NDArray[np.int64], station: NDArray[np.int64], m: NDArray[np.float64], N: int, K: int
) -> ObservationSet:
    order = np.lexsort((station, event))
    return ObservationSet(
        magnitude_type="ML",
        event_ids=np.array([f"e{j:05d}" for j in range(N)], dtype=object),
        event_time=np.datetime64("2025-01-01", "us") + np.arange(N).astype("timedelta64[m]"),
        station_ids=np.array([f"XX.S{i:02d}." for i in range(K)], dtype=object),
        event=event[order],
        station=station[order],
        magnitude=m[order],
        detected=np.ones(event.shape[0], dtype=bool),
    )


def _t4_weights(net: SimulatedNetwork) -> NDArray[np.float64]:
    """Student-t (ν = 4) weights from leave-one-out z, true parameters (docs/estimator.md §6)."""
    obs = net.observations
    s2 = net.sigma**2
    g = event_gls(
        obs.event,
        obs.station,
        obs.magnitude - net.bias[obs.station],
        s2[obs.station],
        obs.n_events,
        net.pairs,
    )
    return np.asarray(5.0 / (4.0 + np.nan_to_num(g.loo_z) ** 2))


# -- E11 and Fisher z --------------------------------------------------------------------------


def test_e11_overlap_table() -> None:
    # docs/pairs.md §6 table / E11 (computed); recomputed here with scipy.stats.norm.ppf.
    rho = np.asarray(E11_RHO)
    for alpha, table in ((0.05, E11_N_ALPHA_005), (0.001, E11_N_ALPHA_0001)):
        z = stats.norm.ppf(1 - alpha / 2) + stats.norm.ppf(0.8)
        direct = np.ceil((z / np.arctanh(rho)) ** 2 + 3).astype(int)
        np.testing.assert_array_equal(direct, table)
        np.testing.assert_array_equal(min_shared_for_power(rho, alpha, 0.8), table)


@pytest.mark.parametrize("n", [8, 40, 500])
def test_fisher_z_interval_matches_scipy(n: int) -> None:
    # Fisher (1921) [from memory]; reference: scipy.stats.pearsonr(...).confidence_interval(),
    # whose default is the Fisher transformation with SE 1/sqrt(n − 3).
    rng = np.random.default_rng(n)
    x = rng.normal(size=n)
    y = 0.6 * x + rng.normal(size=n)
    res = stats.pearsonr(x, y)
    for level in (0.68, 0.95):
        ci = res.confidence_interval(confidence_level=level)
        low, high = fisher_z_interval(res.statistic, n, level)
        assert low == pytest.approx(ci.low, abs=1e-12)
        assert high == pytest.approx(ci.high, abs=1e-12)
    low, high = fisher_z_interval(0.3, 3)
    assert (low, high) == (-1.0, 1.0)


# -- E4: null correlations ------------------------------------------------------------------


@pytest.mark.parametrize("n", [3, 5, 8])
def test_e4_exact_expectation(n: int) -> None:
    # docs/worked-examples.md E4 (derived): exact covariance matrices computed with numpy.
    sigma2 = 0.04
    Sigma = sigma2 * np.eye(n)
    w = np.full(n, 1.0 / n)
    R = np.eye(n) - np.outer(np.ones(n), w)  # residual operator r = (I − 1w')e
    C = R @ Sigma @ R.T
    assert C[0, 1] / np.sqrt(C[0, 0] * C[1, 1]) == pytest.approx(e4_all_station(n), abs=1e-12)
    # Leave-two-out: u_k = e_k − mean of the other n − 2.
    U = np.zeros((2, n))
    U[0, 0] = U[1, 1] = 1.0
    U[:, 2:] -= 1.0 / (n - 2)
    Cu = U @ Sigma @ U.T
    assert Cu[0, 1] / np.sqrt(Cu[0, 0] * Cu[1, 1]) == pytest.approx(e4_leave_two_out(n), abs=1e-12)


def test_e4_by_simulation_equal_stations() -> None:
    # docs/worked-examples.md E4: n = 5 equal stations, all observing 4000 events, independent
    # errors. All-station GLS residuals correlate at −1/(n−1) = −0.25, leave-two-out residuals at
    # +1/(n−1) = +0.25 (the statistic's null ρ0 is exactly that).
    n, N, sigma = 5, 4000, 0.2
    rng = np.random.default_rng(4)
    ev = np.repeat(np.arange(N), n)
    st = np.tile(np.arange(n), N)
    M = rng.uniform(1, 4, size=N)
    m = M[ev] + sigma * rng.standard_normal(N * n)
    obs = _obs_from_arrays(ev, st, m, N, n)
    s2 = np.full(n, sigma**2)
    g = event_gls(obs.event, obs.station, obs.magnitude, s2[obs.station], N)
    r = g.residual.reshape(N, n)
    corr_all = np.corrcoef(r.T)[np.triu_indices(n, 1)]
    assert corr_all.mean() == pytest.approx(e4_all_station(n), abs=0.01)
    det = detect_correlated_pairs(obs, np.zeros(n), s2)
    assert len(det.table) == n * (n - 1) // 2
    np.testing.assert_allclose(det.table["rho_null"], e4_leave_two_out(n), rtol=1e-9)
    assert det.table["r_raw"].mean() == pytest.approx(e4_leave_two_out(n), abs=0.01)
    assert abs(det.table["rho_hat"].mean()) < 0.02  # the statistic removes the null offset
    assert not det.table["flagged"].any()


# -- the statistic against a plain loop --------------------------------------------------------


def _loop_statistics(
    obs: ObservationSet,
    y: NDArray[np.float64],
    s2_row: NDArray[np.float64],
    sigma2: NDArray[np.float64],
    gamma: NDArray[np.float64],
    partners: PairCovariance,
    k: int,
    l: int,
) -> tuple[int, float, float]:
    """Leave-two-out ĉ and T_self for one pair with explicit per-event matrices (reference)."""
    q_list, g_list = [], []
    for j in range(obs.n_events):
        rows = np.flatnonzero(obs.event == j)
        sts = obs.station[rows]
        if k not in sts or l not in sts:
            continue
        drop = {k, l, partners.partner[k], partners.partner[l]}
        keep = rows[[s not in drop for s in sts]]
        if keep.size == 0:
            continue
        ks = obs.station[keep]
        S_w = np.diag(s2_row[keep])  # weighting covariance (robust-weighted variances)
        S_m = np.diag(sigma2[ks])  # model covariance
        for a_i, sa in enumerate(ks):
            for b_i, sb in enumerate(ks):
                if a_i != b_i and partners.partner[sa] == sb:
                    S_w[a_i, b_i] = S_m[a_i, b_i] = partners.partner_cov[sa]
        a = np.linalg.solve(S_w, np.ones(keep.size))
        P = a.sum()
        M_ref = a @ y[keep] / P
        V_ref = a @ S_m @ a / P**2
        rk = rows[sts == k][0]
        rl = rows[sts == l][0]
        q_list.append((y[rk] - M_ref) * (y[rl] - M_ref) - V_ref)
        g_list.append(gamma[j])
    q, g = np.asarray(q_list), np.asarray(g_list)
    c_hat = (g * q).sum() / g.sum()
    t = (g * q).sum() / np.sqrt((g**2 * (q - c_hat) ** 2).sum())
    return q.size, c_hat, t


def test_vectorized_statistic_equals_loop_reference() -> None:
    # Reference: per-event GLS with explicit matrices (numpy.linalg.solve), partner blocks,
    # robust-weighted references and time weights, computed one event at a time.
    rng = np.random.default_rng(11)
    K, N = 8, 80
    cells = rng.random((N, K)) < 0.7
    ev, st = np.nonzero(cells)
    sigma2 = rng.uniform(0.02, 0.09, size=K)
    m = rng.uniform(1, 3, size=N)[ev] + np.sqrt(sigma2[st]) * rng.standard_normal(ev.size)
    obs = _obs_from_arrays(ev.astype(np.int64), st.astype(np.int64), m, N, K)
    bias = rng.normal(0, 0.1, size=K)
    y = obs.magnitude - bias[obs.station]
    omega = np.where(rng.random(obs.n_obs) < 0.1, 0.2, 1.0)
    s2_row = sigma2[obs.station] / omega
    gamma = rng.uniform(0.3, 1.0, size=N)
    partners = PairCovariance(np.array([0, 4]), np.array([1, 6]), np.array([0.01, -0.005]), K)
    index = _pair_index(obs.event, obs.station, N, K)
    ps = _leave_two_out(index, obs.event, obs.station, y, s2_row, sigma2, gamma, N, partners)
    assert index.n_pairs == K * (K - 1) // 2
    for p in range(index.n_pairs):
        k, l = int(index.pair_k[p]), int(index.pair_l[p])
        n, c_hat, t = _loop_statistics(obs, y, s2_row, sigma2, gamma, partners, k, l)
        assert ps.n[p] == n
        if n >= 2:
            assert ps.c_hat[p] == pytest.approx(c_hat, rel=1e-9, abs=1e-12)
            assert ps.t_self[p] == pytest.approx(t, rel=1e-9, abs=1e-12)


def test_chunked_and_binary_search_paths_agree(monkeypatch: pytest.MonkeyPatch) -> None:
    # Same sums whether the row pairs come in one chunk with a dense key table or in many
    # chunks with a binary search (the paths for dense and very large networks).
    import fusion.model.pair_tests as pt

    net = simulate_network(SimulationConfig(n_stations=15, n_events=600), seed=6)
    args = (net.observations, net.bias, net.sigma**2)
    base = detect_correlated_pairs(*args, min_shared=5)
    tet = difference_tetrads(net.observations, net.bias, family=net.pairs, min_shared=5)
    monkeypatch.setattr(pt, "PAIR_CHUNK", 500)
    monkeypatch.setattr(pt, "_DENSE_KEYS", 0)
    index = pt._pair_index(
        net.observations.event, net.observations.station, net.observations.n_events, 15
    )
    assert len(index.chunks) > 10 and index.dense is None
    other = detect_correlated_pairs(*args, min_shared=5)
    pd.testing.assert_frame_equal(base.table, other.table, rtol=1e-9)
    tet2 = difference_tetrads(net.observations, net.bias, family=net.pairs, min_shared=5)
    pd.testing.assert_frame_equal(tet.table, tet2.table, rtol=1e-9)
    assert tet2.family_z == pytest.approx(tet.family_z, rel=1e-9)


# -- the simulator of docs/simulation.md -----------------------------------------------------------


def _pair_keys(net: SimulatedNetwork) -> set[tuple[int, int]]:
    return set(zip(net.pairs.k.tolist(), net.pairs.l.tolist(), strict=True))


def test_simulator_true_pairs_flagged_with_low_fdr() -> None:
    # docs/pairs.md §3 [sim]: K = 40, N = 4000, mar mode, true parameters as the fit: the 3 true
    # pairs (ρ = 0.4, 0.5, 0.6) are flagged, FDR ≤ 0.1 (pooled over seeds), ρ̂ within ±0.15.
    flagged_total, false_total = 0, 0
    for seed in range(4):
        net = simulate_network(SimulationConfig(), seed=seed)
        det = detect_correlated_pairs(
            net.observations, net.bias, net.sigma**2, omega=_t4_weights(net)
        )
        assert det.converged and det.n_rounds <= 3
        true = _pair_keys(net)
        flagged = set(zip(det.covariance.k.tolist(), det.covariance.l.tolist(), strict=True))
        assert true <= flagged
        flagged_total += len(flagged)
        false_total += len(flagged - true)
        tab = det.table.set_index(["k", "l"])
        # Realised error correlation of the simulated sample on shared events without outlier
        # cells (an oracle only the simulator knows).
        obs = net.observations
        e = obs.magnitude - net.magnitude[obs.event] - net.bias_row
        e[net.outlier] = np.nan
        for k, l, rho in zip(net.pairs.k, net.pairs.l, net.pair_rho, strict=True):
            row = tab.loc[(k, l)]
            ek = np.full(obs.n_events, np.nan)
            el = np.full(obs.n_events, np.nan)
            ek[obs.event[obs.station == k]] = e[obs.station == k]
            el[obs.event[obs.station == l]] = e[obs.station == l]
            both = np.isfinite(ek) & np.isfinite(el)
            realised = np.mean(ek[both] * el[both]) / (net.sigma[k] * net.sigma[l])
            assert row["rho_hat"] == pytest.approx(realised, abs=0.05)
            assert row["rho_hat"] == pytest.approx(rho, abs=0.15)
            assert row["status"] == PairStatus.FLAGGED
    assert false_total / flagged_total <= 0.1


def test_null_statistic_is_standard_normal_without_pairs() -> None:
    # docs/pairs.md §3 [sim]: null SD(T_self) 0.98; T ≈ N(0, 1) under H0.
    net = simulate_network(SimulationConfig(pair_rhos=()), seed=5)
    det = detect_correlated_pairs(net.observations, net.bias, net.sigma**2, omega=_t4_weights(net))
    t = det.table["statistic"].to_numpy()
    assert t.size > 500
    assert 0.9 < t.std() < 1.1
    assert abs(t.mean()) < 0.15
    assert det.table["flagged"].sum() == 0


def _neighbour_mean(tab: pd.DataFrame, in_pair: NDArray[np.bool_]) -> float:
    """Mean T of pairs with exactly one station in a true pair."""
    nb = in_pair[tab["k"].to_numpy()] ^ in_pair[tab["l"].to_numpy()]
    return float(tab["statistic"].to_numpy()[nb].mean())


def test_partner_exclusion_removes_negative_bias() -> None:
    # docs/pairs.md §3 [sim]: round 0 (no partners) reads pairs that share a station with a true
    # pair negatively ("a partner left in the reference induces negative covariance"); the iteration
    # removes it. Measured over two seeds: mean T of those pairs −0.4…−0.6 in round 0.
    for seed in (0, 1):
        net = simulate_network(SimulationConfig(), seed=seed)
        om = _t4_weights(net)
        first = detect_correlated_pairs(
            net.observations, net.bias, net.sigma**2, omega=om, max_rounds=1
        )
        final = detect_correlated_pairs(net.observations, net.bias, net.sigma**2, omega=om)
        in_pair = np.zeros(net.observations.n_stations, dtype=bool)
        in_pair[net.pairs.k] = in_pair[net.pairs.l] = True

        assert _neighbour_mean(first.table, in_pair) < -0.3
        assert abs(_neighbour_mean(final.table, in_pair)) < 0.15
        negative = PairStatus.NEGATIVE.value
        assert (final.table["status"] == negative).sum() <= (
            first.table["status"] == negative
        ).sum()


def _correlated_network(
    sigmas: NDArray[np.float64], common: dict[int, float], N: int, seed: int
) -> tuple[ObservationSet, NDArray[np.float64]]:
    """All stations see all events; stations in ``common`` share one N(0, 1) term (weight)."""
    rng = np.random.default_rng(seed)
    K = sigmas.shape[0]
    shared = rng.standard_normal(N)
    e = rng.standard_normal((N, K))
    for i, wgt in common.items():
        e[:, i] = np.sqrt(wgt) * shared + np.sqrt(1 - wgt) * e[:, i]
    m = rng.uniform(1, 4, size=N)[:, None] + sigmas * e
    ev, st = np.nonzero(np.ones((N, K), dtype=bool))
    return _obs_from_arrays(ev, st, m.ravel(), N, K), sigmas**2


def test_shrinkage_and_cap_of_the_covariance() -> None:
    # docs/network-magnitude.md §2; docs/pairs.md: c = ĉ n/(n + n0), then |ρ| ≤ 0.9 min(σk/σl,
    # σl/σk), i.e. |c| ≤ 0.9 min(σk², σl²). Pair (0, 1): σ = 0.1, 0.3, ρ = 0.8 → ĉ ≈ 0.024, cap
    # 0.009. Pair (2, 3): σ = 0.2, 0.2, ρ = 0.5 → not capped; c = ĉ·n/(n + 20).
    sig = np.array([0.1, 0.3, 0.2, 0.2, 0.25, 0.15, 0.2, 0.3])
    obs, s2 = _correlated_network(sig, {0: 0.8, 1: 0.8}, 600, 1)
    obs2, _ = _correlated_network(sig, {2: 0.5, 3: 0.5}, 600, 2)
    det = detect_correlated_pairs(obs, np.zeros(8), s2)
    assert det.covariance.n_pairs == 1
    assert det.covariance.c[0] == pytest.approx(0.9 * 0.1**2, rel=1e-12)
    det2 = detect_correlated_pairs(obs2, np.zeros(8), s2, shrink_n0=20.0)
    row = det2.table[det2.table["flagged"]].iloc[0]
    assert (row["k"], row["l"]) == (2, 3)
    n = row["n_effective"]
    assert det2.covariance.c[0] == pytest.approx(row["c_hat"] * n / (n + 20.0), rel=1e-12)
    assert row["rho_ci_low"] < 0.5 < row["rho_ci_high"]


def test_station_in_several_rejected_pairs_keeps_the_most_significant() -> None:
    # Three stations share one error term: all three pairs are rejected, only the most
    # significant is flagged, the others are marked paired_elsewhere (PairCovariance needs
    # each station in at most one pair).
    sig = np.full(7, 0.2)
    obs, s2 = _correlated_network(sig, {0: 0.5, 1: 0.5, 2: 0.5}, 800, 3)
    det = detect_correlated_pairs(obs, np.zeros(7), s2)
    tab = det.table
    trio = tab[(tab["k"] < 3) & (tab["l"] < 3)]
    assert trio["rejected"].all()
    assert trio["flagged"].sum() == 1
    assert (trio["status"] == PairStatus.PAIRED_ELSEWHERE.value).sum() == 2
    best = trio.sort_values("p_value").iloc[0]
    assert best["flagged"]
    stations = np.concatenate([det.covariance.k, det.covariance.l])
    assert np.unique(stations).size == stations.size


def test_weights_follow_the_documented_rules() -> None:
    net = simulate_network(SimulationConfig(n_stations=15, n_events=800), seed=2)
    obs, b, s2 = net.observations, net.bias, net.sigma**2
    base = detect_correlated_pairs(obs, b, s2)
    # ω ≥ 0.3 counts fully: same result as no weights.
    same = detect_correlated_pairs(obs, b, s2, omega=np.full(obs.n_obs, 0.5))
    np.testing.assert_allclose(same.table["statistic"], base.table["statistic"])
    # γ ≡ 1 is the unweighted statistic.
    ones = detect_correlated_pairs(obs, b, s2, gamma=np.ones(obs.n_events))
    np.testing.assert_allclose(ones.table["c_hat"], base.table["c_hat"])
    # BY (any dependence) is more conservative than BH: never more rejections.
    by = detect_correlated_pairs(obs, b, s2, fdr_method="by")
    assert by.table["rejected"].sum() <= base.table["rejected"].sum()
    both_q = base.table.merge(by.table, on=["k", "l"], suffixes=("_bh", "_by"))
    assert (both_q["q_value_by"] >= both_q["q_value_bh"]).all()
    # A gross outlier (ω < 0.3) is down-weighted in references and leaves its own pairs'
    # statistics: shared-event counts drop by the events where it is a pair member.
    om = np.ones(obs.n_obs)
    om[::50] = 0.05
    diff = detect_correlated_pairs(obs, b, s2, omega=om, min_shared=4)
    full = detect_correlated_pairs(obs, b, s2, min_shared=4)
    both = full.table.merge(diff.table, on=["k", "l"], suffixes=("", "_w"))
    assert (both["n_shared_w"] <= both["n_shared"]).all()
    assert (both["n_shared_w"] < both["n_shared"]).any()
    assert not np.allclose(both["c_hat_w"], both["c_hat"])


def test_two_station_events_give_an_empty_table() -> None:
    # A pair needs a third station for its reference (docs/model.md §3; docs/pairs.md): nothing is
    # tested.
    obs = ObservationSet.from_rows(
        magnitude_type="ML",
        event_id=["a", "a", "b", "b"],
        station_id=["XX.A.", "XX.B.", "XX.A.", "XX.B."],
        magnitude=[1.0, 1.1, 2.0, 2.1],
    )
    det = detect_correlated_pairs(obs, np.zeros(2), np.full(2, 0.04))
    assert det.table.empty and det.covariance.n_pairs == 0 and det.converged
    assert list(det.table.columns)[:2] == ["station_k", "station_l"]
    assert difference_tetrads(obs, np.zeros(2)).table.empty


def test_bad_inputs_raise_typed_errors() -> None:
    net = simulate_network(SimulationConfig(n_stations=10, n_events=200), seed=1)
    obs = net.observations
    with pytest.raises(ConfigError, match="'sigma2' parameter of detect_correlated_pairs"):
        detect_correlated_pairs(obs, net.bias, net.sigma[:-1] ** 2)
    with pytest.raises(ConfigError, match="finite and > 0"):
        detect_correlated_pairs(obs, net.bias, np.zeros(10))
    with pytest.raises(ConfigError, match="'fdr_q'"):
        detect_correlated_pairs(obs, net.bias, net.sigma**2, fdr_q=0.0)
    with pytest.raises(ConfigError, match="'omega'"):
        detect_correlated_pairs(obs, net.bias, net.sigma**2, omega=np.ones(3))
    with pytest.raises(ConfigError, match="'gamma'"):
        detect_correlated_pairs(obs, net.bias, net.sigma**2, gamma=np.ones(3))


# -- global parametric bootstrap -----------------------------------------------------------------


def _truth_fit(
    net: SimulatedNetwork,
) -> Callable[[ObservationSet], tuple[NDArray[np.float64], NDArray[np.float64]]]:
    b, s2 = net.bias.copy(), net.sigma**2

    def fitted(_: ObservationSet) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        return b, s2

    return fitted


def _gls_magnitude(net: SimulatedNetwork, pairs: PairCovariance) -> NDArray[np.float64]:
    obs = net.observations
    s2 = net.sigma**2
    y = obs.magnitude - net.bias[obs.station]
    return event_gls(obs.event, obs.station, y, s2[obs.station], obs.n_events, pairs).magnitude


def test_global_test_p_values_uniform_under_the_null() -> None:
    # Under the model with the generating parameters G and G* are exchangeable, so p is
    # uniform on {1/20, …, 1} (docs/pairs.md §8; rank test of a parametric bootstrap).
    cfg = SimulationConfig(n_stations=12, n_events=400, pair_rhos=(), outlier_rate=0.0)
    p = []
    for seed in range(20):
        net = simulate_network(cfg, seed=seed)
        empty = PairCovariance.empty(12)
        res = global_independence_test(
            net.observations,
            _truth_fit(net),
            net.bias,
            net.sigma**2,
            _gls_magnitude(net, empty),
            empty,
            replicates=19,
            random_state=seed,
            min_shared=20,
        )
        assert res.replicates == 19 and res.null_statistics.shape == (19,)
        assert res.n_pairs > 20
        p.append(res.p_value)
    p_arr = np.asarray(p)
    assert 0.3 < p_arr.mean() < 0.75
    assert stats.kstest(p_arr, "uniform").pvalue > 0.01


def test_global_test_small_when_pairs_left_unflagged() -> None:
    cfg = SimulationConfig(n_stations=12, n_events=1000, outlier_rate=0.0)
    for seed in (0, 1):
        net = simulate_network(cfg, seed=seed)
        empty = PairCovariance.empty(12)
        args = (net.observations, _truth_fit(net), net.bias, net.sigma**2)
        miss = global_independence_test(
            *args, _gls_magnitude(net, empty), empty, replicates=39, random_state=seed
        )
        assert miss.p_value == pytest.approx(1 / 40)
        both = global_independence_test(
            *args, _gls_magnitude(net, net.pairs), net.pairs, replicates=39, random_state=seed
        )
        assert both.p_value > 0.05
        alt = global_independence_test(
            *args,
            _gls_magnitude(net, empty),
            empty,
            replicates=39,
            random_state=seed,
            statistic="max_abs",
        )
        assert alt.method == "max_abs" and alt.p_value == pytest.approx(1 / 40)


def test_global_test_without_eligible_pairs_warns() -> None:
    net = simulate_network(SimulationConfig(n_stations=6, n_events=20), seed=0)
    empty = PairCovariance.empty(6)
    with pytest.warns(DegenerateDataWarning, match="no unflagged pair"):
        res = global_independence_test(
            net.observations,
            _truth_fit(net),
            net.bias,
            net.sigma**2,
            np.zeros(net.observations.n_events),
            empty,
            replicates=5,
            min_shared=500,
        )
    assert np.isnan(res.p_value)


# -- difference tetrads --------------------------------------------------------------------------


def test_difference_tetrads_estimate_pair_covariance() -> None:
    # docs/pairs.md §8 (derived): E[d_ik d_lp] = c_il − c_ip − c_kl + c_kp; with independent other
    # stations the pair's mean tetrad product estimates c_il without σ or M.
    net = simulate_network(SimulationConfig(outlier_rate=0.0), seed=1)
    res = difference_tetrads(net.observations, net.bias, family=net.pairs)
    tab = res.table.set_index(["k", "l"])
    true = _pair_keys(net)
    for k, l, c in zip(net.pairs.k, net.pairs.l, net.pairs.c, strict=True):
        row = tab.loc[(k, l)]
        assert row["mean_product"] == pytest.approx(c, abs=0.004)
        assert row["z"] > 5
    null = np.array([(k, l) not in true for k, l in tab.index])
    in_pair = np.zeros(net.observations.n_stations, dtype=bool)
    in_pair[net.pairs.k] = in_pair[net.pairs.l] = True
    clean = null & ~np.array([in_pair[k] or in_pair[l] for k, l in tab.index])
    z0 = tab["z"].to_numpy()[clean]
    assert 0.85 < z0.std() < 1.15 and abs(z0.mean()) < 0.15
    assert res.family_z > 5 and res.family_n_events > 100


def test_difference_tetrads_closed_form_matches_enumeration() -> None:
    # Reference: explicit enumeration of ordered (k, p), k ≠ p, of the other stations.
    rng = np.random.default_rng(3)
    K, N = 6, 40
    cells = rng.random((N, K)) < 0.8
    ev, st = np.nonzero(cells)
    m = rng.normal(2.0, 0.3, size=ev.size)
    obs = _obs_from_arrays(ev.astype(np.int64), st.astype(np.int64), m, N, K)
    bias = rng.normal(0, 0.1, size=K)
    res = difference_tetrads(obs, bias, min_shared=2)
    y = obs.magnitude - bias[obs.station]
    for _, row in res.table.iterrows():
        i, l = int(row["k"]), int(row["l"])
        vals = []
        for j in range(N):
            rows = np.flatnonzero(obs.event == j)
            sts = obs.station[rows]
            if i not in sts or l not in sts:
                continue
            yi = y[rows[sts == i][0]]
            yl = y[rows[sts == l][0]]
            others = y[rows[(sts != i) & (sts != l)]]
            if others.size < 2:
                continue
            prods = [
                (yi - others[a]) * (yl - others[b])
                for a in range(others.size)
                for b in range(others.size)
                if a != b
            ]
            vals.append(np.mean(prods))
        assert row["n_shared"] == len(vals)
        assert row["mean_product"] == pytest.approx(np.mean(vals), rel=1e-9, abs=1e-12)
