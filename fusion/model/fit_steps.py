"""Steps shared by the two station fitters (REML-EM and the joint censored fit).

:func:`fusion.model.reml_em.fit_reml_em` and :func:`fusion.model.censored_fit.fit_censored_stations`
estimate the same station parameters from different likelihoods, but several of their steps are
the same idea and live here once:

- the Student-t weight ω = (ν + 1)/(ν + u²) and its Gaussian consistency constant κ_ν
  (Lange, Little & Taylor 1989), also used by the per-event estimate
  (:mod:`fusion.network.network_magnitude`), which caps the weight at 1;
- the σ-step, the moderated variance σ_i² = (d0 s0² + Σ terms)/(d0 + Σγ) (Smyth 2004;
  docs/estimator.md);
- the effective degrees of freedom d_i = Σγ(1 − w_ij) and the raw residual variance
  s_i² = (σ-step sum)/d_i;
- the empirical-Bayes refresh of (d0, s0², τ_b²) from those sums
  (:func:`fusion.model.eb_priors.refreshed_prior`) and its schedule;
- the level of the anchor for the fit result (:mod:`fusion.model.anchors`, docs/model.md);
- convergence: the distance to the fixed point (:class:`ConvergenceTracker`) and SQUAREM
  extrapolation (:func:`squarem_step`, :class:`Extrapolation`; Varadhan & Roland 2008).

Every function here is vectorized over stations or rows; nothing loops over events or rows.

References
----------
Lange K. L., Little R. J. A., Taylor J. M. G. (1989). Robust statistical modeling using the t
distribution. JASA 84:881–896 [from memory].
Smyth G. K. (2004). Statistical Applications in Genetics and Molecular Biology 3(1), Art. 3.
Dempster A. P., Laird N. M., Rubin D. B. (1977). Maximum likelihood from incomplete data via the
EM algorithm. JRSS-B 39:1–38 [from memory].
Varadhan R., Roland C. (2008). Simple and globally convergent methods for accelerating the
convergence of any EM algorithm. Scand. J. Stat. 35:335–353 [from memory].
"""

from __future__ import annotations

import functools
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import integrate, stats

from fusion.model.anchors import AnchorKind
from fusion.model.eb_priors import EBPrior, refreshed_prior
from stations.errors import ConfigError

__all__ = [
    "ConvergenceTracker",
    "Extrapolation",
    "anchor_level",
    "check_iteration_parameters",
    "effective_dof",
    "moderated_variance",
    "parameter_error",
    "raw_variance",
    "refresh_due",
    "refresh_prior",
    "squarem_step",
    "student_t_weight",
    "t_weight_consistency",
]


# ------------------------------------------------------------------------------------------
# Results
# ------------------------------------------------------------------------------------------


class StationFitResult:
    """What every station fit result offers besides its fields: σ̃ and SE(b̂) per unit.

    A mixin of :class:`fusion.model.reml_em.RemlEmFit` and
    :class:`fusion.model.censored_fit.CensoredStationFit` (frozen dataclasses with the fields
    ``sigma2`` and ``bias_var``, magnitude units²).
    """

    __slots__ = ()
    sigma2: NDArray[np.float64]
    bias_var: NDArray[np.float64]

    @property
    def sigma(self) -> NDArray[np.float64]:
        """σ̃_i, magnitude units."""
        return np.sqrt(self.sigma2)

    @property
    def bias_se(self) -> NDArray[np.float64]:
        """sqrt(Var b̂_i), magnitude units."""
        return np.sqrt(self.bias_var)


# ------------------------------------------------------------------------------------------
# Parameter checks
# ------------------------------------------------------------------------------------------


def parameter_error(where: str, name: str, rule: str, value: object) -> ConfigError:
    """The error for a parameter of ``where`` outside its range (one wording for all fits)."""
    return ConfigError(f"The {name!r} parameter of {where} must be {rule}. Got {value!r} instead.")


def check_iteration_parameters(
    where: str, *, nu: float, max_iter: int, tol_bias: float, tol_log_sigma: float
) -> None:
    """Check the parameters both station fitters share (t degrees of freedom, iteration limit
    and tolerances); raise :class:`~stations.errors.ConfigError` naming ``where``."""
    if not (nu > 0 and np.isfinite(nu)):
        raise parameter_error(where, "nu", "a float in the range (0, inf)", nu)
    if not (isinstance(max_iter, int | np.integer) and max_iter >= 1):
        raise parameter_error(where, "max_iter", "an int in the range [1, inf)", max_iter)
    if not tol_bias > 0:
        raise parameter_error(where, "tol_bias", "a float in the range (0, inf)", tol_bias)
    if not tol_log_sigma > 0:
        raise parameter_error(
            where, "tol_log_sigma", "a float in the range (0, inf)", tol_log_sigma
        )


# ------------------------------------------------------------------------------------------
# Robust weights
# ------------------------------------------------------------------------------------------


def student_t_weight(
    u2: NDArray[np.float64],
    nu: float,
    *,
    cap_at_one: bool = False,
    out: NDArray[np.float64] | None = None,
    overwrite_u2: bool = False,
) -> NDArray[np.float64]:
    """Student-t weight ω = (ν + 1)/(ν + u²) of a standardised leave-one-out residual u.

    The EM weight of the t model (Lange, Little & Taylor 1989): the station fitters use it as
    is, so a reading that fits better than expected (u² < 1) weighs more than 1; the per-event
    network estimate caps it at 1 (``cap_at_one``) so that no reading gains weight over its
    GLS weight (docs/network-magnitude.md).

    Parameters
    ----------
    u2 : ndarray of float
        Squared standardised residuals u² (dimensionless).
    nu : float
        Degrees of freedom ν > 0.
    cap_at_one : bool, default=False
        Return min(1, ω).
    out : ndarray, optional
        Array to write ω into (may be ``u2`` itself with ``overwrite_u2``).
    overwrite_u2 : bool, default=False
        Allow ν + u² to be formed in the buffer of ``u2`` (saves one array on hot paths).

    Returns
    -------
    ndarray of float
        ω, same shape as ``u2``.
    """
    denom = np.add(u2, nu, out=u2 if overwrite_u2 else None)
    w = np.divide(nu + 1.0, denom, out=out)
    if cap_at_one:
        np.minimum(w, 1.0, out=w)
    return np.asarray(w, dtype=np.float64)


@functools.lru_cache(maxsize=16)
def t_weight_consistency(nu: float) -> float:
    """κ_ν = E[ω(X) X²] for X ~ N(0, 1) and Student-t weights ω(x) = (ν + 1)/(ν + x²).

    Dividing the robust-weighted squared residuals by κ_ν makes the σ-step consistent for
    Gaussian errors (:mod:`fusion.model.reml_em`, docs/estimator.md). κ_4 = 0.78631 (computed by
    quadrature).

    Parameters
    ----------
    nu : float
        Degrees of freedom ν > 0.

    Returns
    -------
    float
    """

    def integrand(x: float) -> float:
        return float((nu + 1.0) * x * x / (nu + x * x) * stats.norm.pdf(x))

    value, _ = integrate.quad(integrand, -np.inf, np.inf)
    return float(value)


# ------------------------------------------------------------------------------------------
# σ-step, degrees of freedom, empirical-Bayes refresh
# ------------------------------------------------------------------------------------------


def moderated_variance(
    prior: EBPrior,
    sums: tuple[NDArray[np.float64], ...],
    count: NDArray[np.float64],
    *,
    where: NDArray[np.bool_] | None = None,
    previous: NDArray[np.float64] | None = None,
) -> NDArray[np.float64]:
    """The σ-step σ_i² = (d0 s0² + Σ sums)/(d0 + count_i), floored at 1e-12 s0².

    The moderated variance of Smyth (2004) with the prior (d0, s0²); d0 = ∞ gives s0².

    Parameters
    ----------
    prior : EBPrior
        d0 (dimensionless) and s0² (magnitude units²).
    sums : tuple of ndarray, shape (K,)
        Per-station sums of squared residual terms (magnitude units²), added to d0 s0² in the
        given order.
    count : ndarray, shape (K,)
        Per-station Σγ (or Σγ c for the censored fit's clean shares).
    where : ndarray of bool, shape (K,), optional
        Update only these stations where d0 + count > 0; the others keep ``previous``.
    previous : ndarray, shape (K,), optional
        Current σ² (required with ``where``).

    Returns
    -------
    ndarray, shape (K,)
        σ_i², magnitude units².
    """
    if where is None:
        if np.isinf(prior.d0):
            return np.full(count.shape[0], prior.s0_2)
        num: Any = prior.d0 * prior.s0_2
        for s in sums:
            num = num + s
        sigma2 = num / (prior.d0 + count)
        return np.asarray(np.maximum(sigma2, 1e-12 * prior.s0_2), dtype=np.float64)
    assert previous is not None
    if np.isinf(prior.d0):
        return np.asarray(np.where(where, prior.s0_2, previous), dtype=np.float64)
    den = prior.d0 + count
    ok = where & (den > 0)
    num_ok: Any = prior.d0 * prior.s0_2
    for s in sums:
        num_ok = num_ok + s[ok]
    out = previous.copy()
    out[ok] = num_ok / den[ok]
    return np.asarray(np.maximum(out, 1e-12 * prior.s0_2), dtype=np.float64)


def effective_dof(
    weight_sum: NDArray[np.float64], share_sum: NDArray[np.float64]
) -> NDArray[np.float64]:
    """d_i = Σ_j γ_j (1 − w_ij) = Σγ − Σγ w, w_ij the row's share of its event estimate.

    Parameters
    ----------
    weight_sum : ndarray, shape (K,)
        Σ_j γ_j over the station's rows that enter the σ-step.
    share_sum : ndarray, shape (K,)
        Σ_j γ_j w_ij over the same rows (w: GLS weight or sensitivity ∂M̂_j/∂m_ij).

    Returns
    -------
    ndarray, shape (K,)
    """
    return np.asarray(weight_sum - share_sum, dtype=np.float64)


def raw_variance(
    q: NDArray[np.float64], dof: NDArray[np.float64], where: NDArray[np.bool_] | None = None
) -> NDArray[np.float64]:
    """s_i² = q_i/d_i, the data-only residual variance; NaN where d_i <= 0 (or not ``where``).

    Parameters
    ----------
    q : ndarray, shape (K,)
        Σγ of the squared residual terms of the σ-step without the prior, magnitude units².
    dof : ndarray, shape (K,)
        Effective degrees of freedom (:func:`effective_dof`).
    where : ndarray of bool, shape (K,), optional
        Stations to compute; NaN elsewhere.
    """
    pos = dof > 0 if where is None else where & (dof > 0)
    out = np.full(q.shape[0], np.nan)
    out[pos] = q[pos] / dof[pos]
    return out


def refresh_prior(
    q: NDArray[np.float64],
    dof: NDArray[np.float64],
    information: NDArray[np.float64],
    bias: NDArray[np.float64],
    weight_sum: NDArray[np.float64],
    prior: EBPrior,
    mu0: float,
    *,
    where: NDArray[np.bool_] | None = None,
) -> EBPrior:
    """Empirical-Bayes refresh of (d0, s0², τ_b²) from one iteration's sums (docs/estimator.md).

    s_i² = q_i/d_i (:func:`raw_variance`) and Var(b̂_i) ≈ 1/(profiled information)_ii go to
    :func:`fusion.model.eb_priors.refreshed_prior` (Smyth 2004 for d0, s0²).

    Parameters
    ----------
    q, dof : ndarray, shape (K,)
        σ-step sums without the prior term and effective degrees of freedom.
    information : ndarray, shape (K,)
        Diagonal of the profiled information of b (1/magnitude units²), ridge excluded.
    bias, weight_sum : ndarray, shape (K,)
        Current b̂ (magnitude units) and Σγ per station.
    prior : EBPrior
    mu0 : float
        Prior mean of the biases.
    where : ndarray of bool, shape (K,), optional
        Stations in the fit; the others enter with NaN s² and infinite Var(b̂).

    Returns
    -------
    EBPrior
    """
    s2 = raw_variance(q, dof, where)
    ok = information > 0 if where is None else where & (information > 0)
    var = np.full(information.shape[0], np.inf)
    var[ok] = 1.0 / information[ok]
    return refreshed_prior(s2, dof, bias, var, weight_sum, prior, mu0)


def refresh_due(iteration: int, eb_every: int) -> bool:
    """The priors are refreshed after the second iteration, then every ``eb_every``."""
    return eb_every > 0 and (iteration == 1 or (iteration + 1) % eb_every == 0)


# ------------------------------------------------------------------------------------------
# Anchor
# ------------------------------------------------------------------------------------------


def anchor_level(
    kind: AnchorKind,
    reference_weight: NDArray[np.float64],
    bias: NDArray[np.float64],
    default: float,
) -> float:
    """Level of the fitted biases under the anchor (docs/model.md, :mod:`fusion.model.anchors`).

    The median of the reference units' biases for the median anchor, the reference-weighted
    sum Σ w_i b̂_i otherwise; ``default`` (the prior mean) without reference units.

    Parameters
    ----------
    kind : AnchorKind
    reference_weight : ndarray, shape (K,)
        Weight of each unit in the reference set (0 outside it).
    bias : ndarray, shape (K,)
        b̂, magnitude units.
    default : float
        Returned when no unit has a positive reference weight.
    """
    in_ref = reference_weight > 0
    if not np.any(in_ref):
        return float(default)
    if kind is AnchorKind.MEDIAN:
        return float(np.median(bias[in_ref]))
    return float(np.dot(reference_weight, bias))


# ------------------------------------------------------------------------------------------
# Convergence and extrapolation
# ------------------------------------------------------------------------------------------


class ConvergenceTracker:
    """Distance of the iterate to the EM fixed point, for b and log σ (docs/estimator.md).

    EM converges linearly, Δ_{k+1} ≈ ρ Δ_k, so the remaining distance is about Δ_k ρ/(1 − ρ)
    (Aitken's argument; Dempster, Laird & Rubin 1977 for the linear rate [from memory]). ρ is
    the largest of the last five observed step ratios below 1, taken only between consecutive
    regular EM steps (not across an extrapolation or a change of the priors, where the ratio
    says nothing about the rate), capped at 0.99; with ρ <= 1/2 the test is the plain step test.
    """

    def __init__(self) -> None:
        self.last: tuple[float, float] | None = None
        self.ratios: list[list[float]] = [[], []]

    def break_chain(self) -> None:
        """The next step does not follow the last one by a plain EM step."""
        self.last = None

    def add(self, db: float, dls: float) -> None:
        """Record one EM step: max|Δb| and max|Δ log σ|."""
        if self.last is not None:
            for col, (prev, cur) in enumerate(zip(self.last, (db, dls), strict=True)):
                if prev > 0 and cur < prev:
                    self.ratios[col] = [*self.ratios[col][-4:], cur / prev]
        self.last = (db, dls)

    @property
    def rate(self) -> float:
        """Observed rate of the σ iteration (last ratio), 0 when unknown."""
        return self.ratios[1][-1] if self.ratios[1] else 0.0

    @property
    def max_rate(self) -> float:
        """The last observed step ratio of b or log σ (the larger), 0 when unknown."""
        return max(self.ratios[0][-1:] + self.ratios[1][-1:], default=0.0)

    def distance(self) -> tuple[float, float]:
        """Estimated distances of b and log σ to the fixed point (inf before a step)."""
        if self.last is None:
            return np.inf, np.inf
        out = []
        for col in (0, 1):
            step = self.last[col]
            rho = min(max(self.ratios[col]), 0.99) if self.ratios[col] else 0.99
            out.append(step * max(rho / (1.0 - rho), 1.0))
        return out[0], out[1]


def squarem_step(
    t0: NDArray[np.float64], t1: NDArray[np.float64], t2: NDArray[np.float64], max_alpha: float
) -> NDArray[np.float64] | None:
    """One SQUAREM extrapolation from three consecutive EM iterates (Varadhan & Roland 2008).

    r = t1 − t0, v = t2 − 2t1 + t0, α = −‖r‖/‖v‖ (their scheme S3) clipped to [−max_alpha, −1],
    t' = t0 − 2αr + α²v. α = −1 gives t2 (no extrapolation); the next EM step from t' is the
    stabilising step of the scheme.
    """
    r = t1 - t0
    v = t2 - 2.0 * t1 + t0
    nv = float(np.linalg.norm(v))
    if nv == 0.0:
        return None
    alpha = -float(np.linalg.norm(r)) / nv
    alpha = min(-1.0, max(alpha, -max_alpha))
    if alpha == -1.0:
        return None
    return np.asarray(t0 - 2.0 * alpha * r + alpha * alpha * v, dtype=np.float64)


class Extrapolation:
    """SQUAREM control of one fit: the iterate history, the step limit and the overshoot rule.

    After each regular EM step the fitter calls :meth:`after_step` with the step size and the
    new iterate θ; when the observed rate exceeds ``min_rate`` an extrapolated θ' is returned
    (the caller installs it and the next EM step stabilises it). A step more than twice the
    one that followed the last jump halves the largest extrapolation allowed. A change of the
    EM map (new priors) calls :meth:`reset`.

    Parameters
    ----------
    tracker : ConvergenceTracker
        The fit's tracker (its chain is broken at each jump).
    enabled : bool
        False never extrapolates.
    max_alpha : float, default=50.0
        Largest extrapolation factor at the start.
    min_rate : float, default=0.6
        Extrapolate only when the observed rate exceeds this.
    """

    def __init__(
        self,
        tracker: ConvergenceTracker,
        *,
        enabled: bool,
        max_alpha: float = 50.0,
        min_rate: float = 0.6,
    ) -> None:
        self.tracker = tracker
        self.enabled = enabled
        self.max_alpha = max_alpha
        self.min_rate = min_rate
        self.theta: list[NDArray[np.float64]] = []
        self.post_jump: float | None = None

    def reset(self) -> None:
        """The EM map changed: do not extrapolate across it."""
        self.theta.clear()
        self.tracker.break_chain()

    def after_step(
        self, step: float, theta: NDArray[np.float64], rate: float
    ) -> NDArray[np.float64] | None:
        """Record θ after an EM step of size ``step``; return an extrapolated θ' or None.

        ``rate`` is the observed rate the decision uses (of σ only, or of b and σ).
        """
        if self.post_jump is not None and step > 2.0 * self.post_jump:
            self.max_alpha = max(1.0, 0.5 * self.max_alpha)  # the jump overshot
        self.post_jump = None
        self.theta.append(theta)
        if not (self.enabled and len(self.theta) >= 3 and rate > self.min_rate):
            return None
        jumped = squarem_step(self.theta[-3], self.theta[-2], self.theta[-1], self.max_alpha)
        if jumped is not None:
            self.post_jump = step
            self.reset()
        return jumped
