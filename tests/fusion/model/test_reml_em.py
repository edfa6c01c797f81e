"""The profiled REML-EM (docs/estimator.md §3): worked examples, anchors, solvers, accuracy."""

from __future__ import annotations

import functools
import warnings

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from fusion.model.anchors import Anchor, AnchorKind, ReferenceEvents
from fusion.model.eb_priors import EBPrior
from fusion.model.forgetting import WarmStart
from fusion.model.reml_em import fit_reml_em, t_weight_consistency
from fusion.model.simulation import (
    SimulatedNetwork,
    SimulationConfig,
    oracle_estimate,
    simulate_network,
)
from fusion.network.gls_blocks import PairCovariance
from fusion.observations import ObservationSet
from stations.errors import ConfigError, ConvergenceWarning, InsufficientDataError
from tests.reference import estimator as ref

#: No priors, no ridge: the bare REML-EM σ-step (E8, E9 and exact identities).
FLAT = EBPrior(d0=0.0, s0_2=0.04, tau_b2=np.inf)


def _complete(m: np.ndarray) -> ObservationSet:
    """Complete N×K station magnitudes as an ObservationSet (events in row order)."""
    N, K = m.shape
    return ObservationSet(
        magnitude_type="ML",
        event_ids=np.array([f"e{j:06d}" for j in range(N)], dtype=object),
        event_time=np.datetime64("2025-01-01", "us") + np.arange(N).astype("timedelta64[h]"),
        station_ids=np.array([f"XX.S{i:02d}." for i in range(K)], dtype=object),
        event=np.repeat(np.arange(N, dtype=np.int64), K),
        station=np.tile(np.arange(K, dtype=np.int64), N),
        magnitude=m.ravel().astype(float),
        detected=np.ones(N * K, dtype=bool),
    )


@functools.lru_cache(maxsize=8)
def _sim(mode: str, seed: int, n_events: int = 2000, pairs: bool = False) -> SimulatedNetwork:
    cfg = SimulationConfig(
        mode=mode,  # type: ignore[arg-type]
        n_events=n_events,
        pair_rhos=(0.4, 0.5, 0.6) if pairs else (),
    )
    return simulate_network(cfg, seed=seed)


# --- docs/worked-examples.md -------------------------------------------------------------


def test_e8_naive_sequence_and_reml_fixed_point() -> None:
    """E8: the naive map σ_i² ← E r_i² collapses; the REML-EM σ-step leaves any split unchanged.

    The naive loop below is written from docs/estimator.md §2: with M_j free,
    E r_i² = σ_i² − 2w_iσ_i² + Σ_k w_k²σ_k² (GLS weights w); docs/worked-examples.md prints its
    first six steps.
    """
    s = np.array(ref.E8_START)
    for expected in ref.E8_SEQUENCE:
        w = (1 / s) / np.sum(1 / s)
        s = s - 2 * w * s + np.sum(w * w * s)
        for got, text in zip(s, expected, strict=True):
            assert got == pytest.approx(float(text), abs=ref.printed_tol(text))

    # REML-EM on two-station data whose squared difference averages σ1² + σ2² = 0.41 exactly.
    rng = np.random.default_rng(0)
    N = 400
    d = np.sqrt(0.41) * np.where(np.arange(N) % 2 == 0, 1.0, -1.0)
    M = rng.uniform(1.0, 4.0, N)
    obs = _complete(np.column_stack([M + d / 2, M - d / 2]))
    for start in (ref.E8_START, (0.30, 0.11)):
        init = WarmStart(bias=np.zeros(2), sigma2=np.array(start))
        fit = fit_reml_em(obs, anchor=Anchor(), init=init, prior=FLAT, eb_every=0)
        assert fit.sigma2 == pytest.approx(start, abs=1e-12)
        assert fit.converged and fit.n_iter == 3  # the minimum: three steps of size 0
        assert fit.connectivity.bipartite.tolist() == [True]  # σ not identifiable (E12)


def test_e9_neyman_scott() -> None:
    """E9: naive σ̂² → σ²(n−1)/n with M_j free; REML-EM → σ² (n = 3, σ = 0.2, 20,000 events).

    Sampling SD of σ̂² per station here is about σ²·sqrt(2/(N(n−1)/n)) ≈ 5e-4 (2 %), so 5 %.
    """
    rng = np.random.default_rng(9)
    N, n, sigma = 20_000, ref.E9_N_STATIONS, ref.E9_SIGMA
    b = np.array([0.1, -0.05, -0.05])
    m = rng.uniform(1.0, 5.0, N)[:, None] + b + rng.normal(0.0, sigma, (N, n))
    fit = fit_reml_em(_complete(m), anchor=Anchor(), robust=False)
    assert fit.sigma2 == pytest.approx(np.full(n, sigma**2), rel=0.05)
    # Naive: M_j free, equal weights, b by column means, σ² = mean r² (one pooled value).
    y = m - (m.mean(axis=0) - m.mean())
    naive = np.mean((y - y.mean(axis=1, keepdims=True)) ** 2)
    assert naive == pytest.approx(sigma**2 * ref.E9_NAIVE_FACTOR, rel=0.05)


def test_e10_gem_weights_equal_inverse_variance() -> None:
    """E10: C⁻¹1/1'C⁻¹1 with C = Var(M)11' + diag(σ²) are the inverse-variance GLS weights."""
    C = ref.E10_VAR_M + np.diag(ref.E10_SIGMA2)
    gem = np.linalg.solve(C, np.ones(3))
    gem /= gem.sum()
    for got, text in zip(gem, ref.E10_WEIGHTS, strict=True):
        assert got == pytest.approx(float(text), abs=ref.printed_tol(text))
    # The fit's event weights on data simulated with that C.
    rng = np.random.default_rng(10)
    N = 20_000
    sigma = np.sqrt(ref.E10_SIGMA2)
    M = rng.normal(3.0, np.sqrt(ref.E10_VAR_M), N)
    fit = fit_reml_em(_complete(M[:, None] + rng.normal(0.0, sigma, (N, 3))), anchor=Anchor(),
                      robust=False)  # fmt: skip
    w = fit.row_gls_weight.reshape(N, 3)
    assert np.allclose(w, w[0])  # complete data, no robust weights: one weight vector
    fitted_C = np.var(fit.event_magnitude) + np.diag(fit.sigma2)
    fitted_gem = np.linalg.solve(fitted_C, np.ones(3))
    assert w[0] == pytest.approx(fitted_gem / fitted_gem.sum(), abs=1e-12)
    assert w[0] == pytest.approx(gem, abs=0.01)  # sampling error of σ̂ at N = 20,000


def test_e4_null_residual_correlations() -> None:
    """E4: all-station residual correlation −1/(n−1), leave-two-out +1/(n−1) (n = 4).

    Sampling SD of a correlation at N = 5000 is below 0.015, so the tolerance is 0.04.
    """
    rng = np.random.default_rng(4)
    N, n = 5000, ref.E4_N_STATIONS
    m = rng.uniform(1.0, 4.0, N)[:, None] + rng.normal(0.0, 0.25, (N, n))
    fit = fit_reml_em(_complete(m), anchor=Anchor(), robust=False)
    r = fit.residual.reshape(N, n)
    assert np.corrcoef(r[:, 0], r[:, 1])[0, 1] == pytest.approx(ref.e4_all_station(n), abs=0.04)
    y = m - fit.bias
    u0 = y[:, 0] - y[:, 2:].mean(axis=1)
    u1 = y[:, 1] - y[:, 2:].mean(axis=1)
    assert np.corrcoef(u0, u1)[0, 1] == pytest.approx(ref.e4_leave_two_out(n), abs=0.04)


# --- robust weights and scale consistency ---------------------------------------------------


def test_t_weight_consistency_constant() -> None:
    """κ_4 = E[ω(X)X²] by scipy quadrature (computed, tests/reference/estimator.py)."""
    assert t_weight_consistency(4.0) == pytest.approx(
        float(ref.KAPPA_NU4), abs=ref.printed_tol(ref.KAPPA_NU4)
    )


def test_robust_scale_is_consistent_for_gaussian_errors() -> None:
    """On Gaussian data the robust σ̂ estimates σ; the literal t-EM scale converges to √c σ.

    c solves c = E[(ν+1)X²/(ν + X²/c)] (scipy.integrate.quad + brentq, computed here).
    """
    nu = 4.0

    def rhs(c: float) -> float:
        f = lambda x: (nu + 1) * x * x / (nu + x * x / c) * stats.norm.pdf(x)  # noqa: E731
        return float(integrate.quad(f, -np.inf, np.inf)[0])

    c = optimize.brentq(lambda c: rhs(c) - c, 0.3, 1.5)
    assert c == pytest.approx(float(ref.T_SCALE_FIXED_POINT_NU4), abs=1e-5)
    rng = np.random.default_rng(21)
    N, K = 6000, 8
    sigma = np.linspace(0.15, 0.35, K)
    m = rng.uniform(1.0, 4.0, N)[:, None] + rng.normal(0.0, sigma, (N, K))
    obs = _complete(m)
    consistent = fit_reml_em(obs, anchor=Anchor())
    literal = fit_reml_em(obs, anchor=Anchor(), scale_consistency=False)
    assert np.median(consistent.sigma / sigma) == pytest.approx(1.0, abs=0.03)
    assert np.median(literal.sigma / sigma) == pytest.approx(np.sqrt(c), abs=0.03)


def test_outliers_are_down_weighted_and_listed() -> None:
    """A station with 8 % gross errors (±1.5) gets an outlier rate near 8 % (ω < 0.3).

    Outlier listing: docs/estimator.md §6.

    (With far more contamination the t model absorbs it into a larger σ instead: ω of a ±1.5
    error at σ̂ ≈ 0.8 is about 0.7.)
    """
    rng = np.random.default_rng(5)
    N, K = 1500, 6
    m = rng.uniform(1.0, 4.0, N)[:, None] + rng.normal(0.0, 0.2, (N, K))
    bad = rng.random(N) < 0.08
    m[bad, 0] += rng.choice([-1.5, 1.5], size=int(bad.sum()))
    fit = fit_reml_em(_complete(m), anchor=Anchor())
    assert fit.outlier_rate[0] == pytest.approx(bad.mean(), abs=0.02)
    assert np.all(fit.outlier_rate[1:] < 0.01)
    w = fit.row_weight.reshape(N, K)
    assert np.median(w[bad, 0]) < 0.3 < np.median(w[~bad, 0])


# --- anchors ------------------------------------------------------------------------------------


def _fixed(obs: ObservationSet, anchor: Anchor, **kw: object):  # type: ignore[no-untyped-def]
    """A fit without ridge or EB refresh and without robust weights (exact invariances)."""
    return fit_reml_em(
        obs, anchor=anchor, prior=FLAT, eb_every=0, robust=False, tol_bias=1e-9,
        tol_log_sigma=1e-8, max_iter=500, **kw,  # type: ignore[arg-type]
    )  # fmt: skip


def test_anchor_shifts_everything_by_one_constant() -> None:
    """docs/model.md §3: the anchor moves all b̂ by δ and all M̂ by −δ; σ̂ and V_j do not change."""
    net = _sim("mar", 1)
    obs = net.observations
    a = _fixed(obs, Anchor())
    R = tuple(obs.station_ids[:5])
    b = _fixed(obs, Anchor(reference_stations=R, reference_weights=(1, 2, 3, 4, 5), value=0.2))
    shift = b.bias - a.bias
    assert np.ptp(shift) < 1e-7
    used = a.event_used
    assert np.allclose(b.event_magnitude[used] - a.event_magnitude[used], -shift[0], atol=1e-7)
    assert np.allclose(b.sigma2, a.sigma2, rtol=1e-7)
    assert np.allclose(b.event_variance[used], a.event_variance[used], rtol=1e-7)
    w = np.array([1, 2, 3, 4, 5]) / 15
    assert np.dot(w, b.bias[:5]) == pytest.approx(0.2, abs=1e-10)
    assert b.anchor.value == pytest.approx(0.2, abs=1e-10)
    assert b.anchor.kind is AnchorKind.REFERENCE_SET and b.anchor.n_reference == 5


def test_median_anchor() -> None:
    fit = fit_reml_em(_sim("mar", 1).observations, anchor=Anchor(kind=AnchorKind.MEDIAN))
    assert np.median(fit.bias) == pytest.approx(0.0, abs=1e-12)
    assert fit.anchor.value == pytest.approx(0.0, abs=1e-12)
    # se = τ_b sqrt(π/(2|R|)), the asymptotic SD of a normal median [from memory].
    assert fit.anchor.se == pytest.approx(np.sqrt(fit.prior.tau_b2 * np.pi / (2 * 40)))


def test_reference_events_fix_the_absolute_level() -> None:
    """A3 hard: M̂_j = M*_j on reference events and b̂ recovers the absolute biases."""
    net = _sim("mar", 2)
    obs = net.observations
    pick = np.arange(0, obs.n_events, 100)
    refev = ReferenceEvents(event_id=obs.event_ids[pick], magnitude=net.magnitude[pick])
    fit = fit_reml_em(obs, anchor=Anchor(kind=AnchorKind.REFERENCE_EVENTS, reference_events=refev))
    used = fit.event_used[pick]
    assert np.allclose(fit.event_magnitude[pick][used], net.magnitude[pick][used], atol=1e-12)
    assert np.allclose(fit.event_variance[pick][used], 0.0)
    counts = obs.station_counts()
    good = counts >= 100
    assert np.sqrt(np.mean((fit.bias - net.bias)[good] ** 2)) < 0.03  # absolute, no re-centring
    assert fit.anchor.n_reference == int(used.sum()) and 0 < fit.anchor.se < 0.05
    # A soft prior (SD 0.1) pulls M̂ toward M* but not onto it.
    soft = ReferenceEvents(
        event_id=obs.event_ids[pick], magnitude=net.magnitude[pick] + 0.3,
        uncertainty=np.full(pick.shape[0], 0.1),
    )  # fmt: skip
    fit2 = fit_reml_em(obs, anchor=Anchor(kind=AnchorKind.REFERENCE_EVENTS, reference_events=soft))
    gap = (fit2.event_magnitude - net.magnitude)[pick][used]
    assert 0.0 < np.median(gap) < 0.3


def test_mean_magnitude_anchor() -> None:
    """A4: the γ-weighted mean of M̂ over the fitted events equals the given value."""
    obs = _sim("mar", 3).observations
    fit = fit_reml_em(obs, anchor=Anchor(kind=AnchorKind.MEAN_MAGNITUDE, mean_magnitude=2.0))
    assert np.mean(fit.event_magnitude[fit.event_used]) == pytest.approx(2.0, abs=1e-9)
    assert fit.anchor.n_reference == int(fit.event_used.sum())


def test_unanchored_component_is_uncalibrated() -> None:
    """Two disjoint networks, reference stations only in the first (docs/model.md §3)."""
    rng = np.random.default_rng(6)
    N = 600
    m = rng.uniform(1, 4, N)[:, None] + rng.normal(0, 0.2, (N, 3)) + np.array([0.1, 0.0, -0.1])
    a = _complete(m)
    ev = np.concatenate([a.event, a.event + N])
    st = np.concatenate([a.station, a.station + 3])
    obs = ObservationSet(
        magnitude_type="ML",
        event_ids=np.array([f"e{j}" for j in range(2 * N)], dtype=object),
        event_time=np.zeros(2 * N, dtype="datetime64[us]"),
        station_ids=np.array([f"XX.S{i}." for i in range(6)], dtype=object),
        event=ev,
        station=st,
        magnitude=np.concatenate([a.magnitude, a.magnitude + 0.5]),
        detected=np.ones(ev.shape[0], dtype=bool),
    )
    fit = fit_reml_em(obs, anchor=Anchor(reference_stations=("XX.S0.", "XX.S1.")))
    assert fit.uncalibrated.tolist() == [False] * 3 + [True] * 3
    assert fit.connectivity.n_components == 2
    assert np.mean(fit.bias[3:]) == pytest.approx(0.0, abs=1e-10)  # fallback mean = μ0
    assert np.mean(fit.bias[:2]) == pytest.approx(0.0, abs=1e-10)


# --- solvers, weights, warm start -------------------------------------------------------------


def test_direct_and_pcg_agree_with_pairs() -> None:
    """Dense factorisation and projected CG solve one bordered system (docs/estimator.md §4)."""
    net = _sim("select_m", 4, pairs=True)
    kw = {"anchor": Anchor(reference_stations=tuple(net.observations.station_ids[:8]))}
    a = fit_reml_em(net.observations, pairs=net.pairs, solver="direct", **kw)  # type: ignore[arg-type]
    b = fit_reml_em(net.observations, pairs=net.pairs, solver="pcg", **kw)  # type: ignore[arg-type]
    assert (a.solver, b.solver) == ("direct", "pcg")
    assert np.max(np.abs(a.bias - b.bias)) < 1e-6
    assert np.max(np.abs(a.sigma - b.sigma)) < 1e-6
    assert np.allclose(a.bias_var, b.bias_var, rtol=1e-5)
    assert a.pairs is not None and b.pairs is not None
    assert np.allclose(a.pairs.c, b.pairs.c, atol=1e-7)


def test_pair_covariances_are_re_estimated_shrunk_and_capped() -> None:
    """σ-step for c_kl: Σγ(r_k r_l + V)/Σγ, shrunk n/(n + n0), capped (docs/pairs.md §4)."""
    net = _sim("mar", 5, pairs=True)
    start = PairCovariance(net.pairs.k, net.pairs.l, np.zeros(3), net.observations.n_stations)
    fit = fit_reml_em(net.observations, pairs=start, anchor=Anchor())
    assert fit.pairs is not None
    true_c = net.pair_rho * net.sigma[net.pairs.k] * net.sigma[net.pairs.l]
    rho_hat = fit.pairs.c / np.sqrt(fit.sigma2[fit.pairs.k] * fit.sigma2[fit.pairs.l])
    assert np.all(rho_hat > 0.2)
    assert fit.pairs.c == pytest.approx(true_c, rel=0.35)  # n ~ 400 shared events; ρ̂ SD ~ 0.05
    cap = 0.9 * np.minimum(fit.sigma2[fit.pairs.k], fit.sigma2[fit.pairs.l])
    assert np.all(np.abs(fit.pairs.c) <= cap + 1e-15)
    # A hopeless start (ρ = 0.99) is capped and re-estimated, not carried.
    wild = PairCovariance(net.pairs.k, net.pairs.l, np.full(3, 0.5), net.observations.n_stations)
    fit2 = fit_reml_em(net.observations, pairs=wild, anchor=Anchor())
    assert fit2.pairs is not None
    assert fit2.pairs.c == pytest.approx(fit.pairs.c, abs=1e-4)


def test_gamma_is_a_frequency_weight() -> None:
    """γ = 0 drops an event; a common factor on γ changes nothing (all sums are ratios)."""
    obs = _sim("mar", 6).observations
    full = _fixed(obs, Anchor())
    half = _fixed(obs, Anchor(), gamma=np.full(obs.n_events, 0.5))
    assert np.allclose(half.bias, full.bias, atol=1e-8)
    assert np.allclose(half.sigma2, full.sigma2, rtol=1e-7)
    keep = np.arange(obs.n_events) % 3 != 0
    zero = _fixed(obs, Anchor(), gamma=keep.astype(float))
    sub = _fixed(obs.subset(keep[obs.event]), Anchor())
    assert np.allclose(zero.bias, sub.bias, atol=1e-8)
    assert np.allclose(zero.sigma2, sub.sigma2, rtol=1e-7)
    assert not zero.event_used[~keep].any()


def test_warm_start_converges_faster_to_the_same_answer() -> None:
    obs = _sim("mar", 7).observations
    cold = fit_reml_em(obs, anchor=Anchor())
    warm = fit_reml_em(obs, anchor=Anchor(), init=WarmStart(cold.bias, cold.sigma2, cold.prior))
    assert warm.n_iter < cold.n_iter
    assert np.max(np.abs(warm.bias - cold.bias)) < 1e-3
    assert np.max(np.abs(np.log(warm.sigma / cold.sigma))) < 5e-3


def test_outputs_and_prior_dominated() -> None:
    net = _sim("select_m", 8)
    fit = fit_reml_em(net.observations, anchor=Anchor())
    K, N, n = net.observations.n_stations, net.observations.n_events, net.observations.n_obs
    assert fit.bias.shape == fit.bias_var.shape == fit.sigma2.shape == (K,)
    assert fit.bias_cov is not None and fit.bias_cov.shape == (K, K)
    assert np.allclose(np.diag(fit.bias_cov), fit.bias_var)
    assert fit.row_weight.shape == fit.residual.shape == (n,)
    assert fit.event_magnitude.shape == (N,)
    assert np.array_equal(fit.prior_dominated, fit.dof < fit.prior.d0)
    assert np.all(np.isnan(fit.event_magnitude[~fit.event_used]))
    # Var(b̂) ≈ σ²/Σγω(1 − w) (docs/estimator.md §5.2) for well-observed stations, within 15 %.
    approx = fit.sigma2 / fit.dof
    good = fit.dof > 100
    assert np.allclose(fit.bias_var[good], approx[good], rtol=0.15)
    # Beyond dense_cov_max units no Cov(b̂) is formed; Var(b̂) is the diagonal approximation.
    big = fit_reml_em(net.observations, anchor=Anchor(), dense_cov_max=0)
    assert big.bias_cov is None
    assert np.allclose(big.bias_var, fit.bias_var, rtol=0.10)  # measured: within 6 %


# --- simulator at reduced size (issue 3; looser than bench/fit_accuracy.py) -------------------


@pytest.mark.parametrize(("mode", "seed"), [("mar", 11), ("select_m", 12)])
def test_simulator_accuracy(mode: str, seed: int) -> None:
    """Bias and σ recovery, event RMSE vs the oracle, plain mean and median (docs/simulation.md).

    K = 40, N = 2000 (half the benchmark's year); bounds from tests/reference/estimator.py.
    """
    net = _sim(mode, seed)
    obs = net.observations
    fit = fit_reml_em(obs, anchor=Anchor())
    counts = obs.station_counts()
    good = counts >= 100
    b_err = (fit.bias - fit.bias.mean()) - (net.bias - net.bias.mean())
    assert np.sqrt(np.mean(b_err[good] ** 2)) < 0.03
    lo, hi = ref.SIGMA_RATIO_BOUNDS
    assert lo <= np.median(fit.sigma[good] / net.sigma[good]) <= hi
    # Events whose stations all have >= 100 readings; a common level (mean true bias).
    all_good = np.bincount(obs.event, weights=~good[obs.station], minlength=obs.n_events) == 0
    ev = fit.event_used & all_good
    level = net.bias.mean()
    oracle, _ = oracle_estimate(net)
    m = obs.magnitude
    plain = np.bincount(obs.event, weights=m, minlength=obs.n_events) / obs.event_counts()
    order = np.lexsort((m, obs.event))
    med = np.array([np.median(m[order][obs.event[order] == j]) for j in np.flatnonzero(ev)])

    def rmse(x: np.ndarray) -> float:
        return float(np.sqrt(np.mean((x - net.magnitude[ev]) ** 2)))

    ours = rmse(fit.event_magnitude[ev] - level)
    assert ours <= ref.RMSE_ORACLE_FACTOR * rmse(oracle[ev])
    assert ours < rmse(plain[ev] - level)
    assert ours < rmse(med - level)
    # Collapse guard (docs/simulation.md).
    assert fit.sigma.min() >= ref.COLLAPSE_FRACTION * np.sqrt(fit.prior.s0_2)


def test_collapse_guard_on_a_two_station_chain() -> None:
    """Pair-only events (a bipartite chain): σ̂ stays off zero (docs/estimator.md §2)."""
    rng = np.random.default_rng(13)
    K, N = 6, 3000
    sigma = np.linspace(0.1, 0.3, K)
    k = rng.integers(0, K - 1, N)
    st = np.column_stack([k, k + 1]).ravel()
    ev = np.repeat(np.arange(N), 2)
    M = rng.uniform(1, 4, N)
    obs = ObservationSet(
        magnitude_type="ML",
        event_ids=np.array([f"e{j}" for j in range(N)], dtype=object),
        event_time=np.zeros(N, dtype="datetime64[us]"),
        station_ids=np.array([f"XX.S{i}." for i in range(K)], dtype=object),
        event=ev,
        station=st,
        magnitude=M[ev] + rng.normal(0, sigma[st]),
        detected=np.ones(2 * N, dtype=bool),
    )
    fit = fit_reml_em(obs, anchor=Anchor())
    assert fit.connectivity.bipartite.tolist() == [True]
    assert fit.sigma.min() >= ref.COLLAPSE_FRACTION * np.sqrt(fit.prior.s0_2)
    # The identifiable sums σ_k² + σ_{k+1}² are recovered.
    sums = fit.sigma2[:-1] + fit.sigma2[1:]
    assert sums == pytest.approx(sigma[:-1] ** 2 + sigma[1:] ** 2, rel=0.15)


# --- errors and warnings ---------------------------------------------------------------------


def test_errors_and_warnings() -> None:
    obs = _sim("mar", 1).observations
    with pytest.raises(ConfigError, match="'nu' parameter of fit_reml_em"):
        fit_reml_em(obs, anchor=Anchor(), nu=0.0)
    with pytest.raises(ConfigError, match="'solver'"):
        fit_reml_em(obs, anchor=Anchor(), solver="lu")  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match="gamma"):
        fit_reml_em(obs, anchor=Anchor(), gamma=np.ones(3))
    with pytest.warns(ConvergenceWarning, match="max_iter=2"):
        fit = fit_reml_em(obs, anchor=Anchor(), max_iter=2)
    assert not fit.converged and fit.n_iter == 2
    single = obs.subset(np.r_[True, np.diff(obs.event) != 0])  # first row of each event
    with pytest.raises(InsufficientDataError, match="two or more usable"):
        fit_reml_em(single, anchor=Anchor())
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit_reml_em(obs, anchor=Anchor())  # no warning on a regular fit
