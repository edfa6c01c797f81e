"""False-discovery-rate control for families of tests: Benjamini–Hochberg and Benjamini–Yekutieli.

Used by the correlated-pair search (docs/pairs.md §3): every station pair with enough shared events
is one test, and the family is controlled at FDR level q.

For m p-values sorted p_(1) ≤ … ≤ p_(m), the step-up procedure rejects H_(1) … H_(r) with
r = max{i : p_(i) ≤ i q / (m c_m)}; equivalently it rejects every hypothesis whose adjusted
p-value (q-value)

    q_(i) = min_{t ≥ i} min(1, c_m m p_(t) / t)

is at most q. Benjamini & Hochberg (1995) use c_m = 1; their procedure controls the FDR under
independence and under positive regression dependence (Benjamini & Yekutieli 2001, Thm 1.2).
Benjamini & Yekutieli (2001, Thm 1.3) use c_m = Σ_{i≤m} 1/i, which controls the FDR under any
dependence (for m = 10, c_m = 2.928968). Tests sharing a station are dependent, so BY is the
conservative choice for alarms (docs/pairs.md §3).

References
----------
Benjamini Y., Hochberg Y. (1995). Controlling the false discovery rate: a practical and powerful
approach to multiple testing. JRSS-B 57(1):289–300.
Benjamini Y., Yekutieli D. (2001). The control of the false discovery rate in multiple testing
under dependency. Ann. Stat. 29(4):1165–1188.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import ConfigError

__all__ = ["FDRMethod", "FDRResult", "by_divisor", "fdr_adjust", "fdr_control"]


class FDRMethod(StrEnum):
    """Step-up FDR procedures: ``bh`` (Benjamini & Hochberg 1995), ``by`` (Benjamini &
    Yekutieli 2001)."""

    BH = "bh"
    BY = "by"


@dataclass(frozen=True, slots=True, eq=False)
class FDRResult:
    """Outcome of an FDR-controlled family of tests.

    Attributes
    ----------
    reject : ndarray of bool, shape (m_all,)
        Rejected hypotheses, in the input order; False where the p-value was NaN.
    q_value : ndarray of float, shape (m_all,)
        Adjusted p-values (see module docstring); NaN where the p-value was NaN.
    method : FDRMethod
    level : float
        The FDR level q the family was controlled at (fraction, not percent).
    n_tests : int
        m, the number of finite p-values (NaN entries are not part of the family).
    """

    reject: NDArray[np.bool_]
    q_value: NDArray[np.float64]
    method: FDRMethod
    level: float
    n_tests: int


def by_divisor(m: int) -> float:
    """c_m = Σ_{i=1}^{m} 1/i, the Benjamini–Yekutieli divisor of q (c_10 = 2.928968)."""
    if m < 0:
        raise ConfigError(
            f"The 'm' parameter of by_divisor must be an int in the range [0, inf). "
            f"Got {m} instead."
        )
    return float(np.sum(1.0 / np.arange(1, m + 1))) if m else 0.0


def _method(method: str) -> FDRMethod:
    try:
        return FDRMethod(str(method).lower())
    except ValueError:
        allowed = ", ".join(repr(m.value) for m in FDRMethod)
        raise ConfigError(
            f"The 'method' parameter must be one of {allowed}. Got {method!r} instead."
        ) from None


def fdr_adjust(p_values: ArrayLike, *, method: str = "bh") -> NDArray[np.float64]:
    """Adjusted p-values (q-values) of a family, in the input order.

    Parameters
    ----------
    p_values : array_like of float, shape (m_all,)
        p-values in [0, 1]; NaN marks a hypothesis that was not tested and is left out of the
        family (its q-value is NaN).
    method : {'bh', 'by'}, default='bh'
        Benjamini–Hochberg or Benjamini–Yekutieli (module docstring).

    Returns
    -------
    ndarray of float, shape (m_all,)

    Raises
    ------
    ConfigError
        If a finite p-value lies outside [0, 1] or ``method`` is unknown.

    Notes
    -----
    Vectorized: one argsort, a reverse running minimum (``np.minimum.accumulate``) and a
    scatter back to the input order. Ties get equal q-values.
    """
    kind = _method(method)
    p = np.asarray(p_values, dtype=np.float64).ravel()
    out = np.full(p.shape, np.nan)
    finite = ~np.isnan(p)
    pf = p[finite]
    if np.any((pf < 0.0) | (pf > 1.0)):
        bad = pf[(pf < 0.0) | (pf > 1.0)][0]
        raise ConfigError(f"p-values must lie in [0, 1]; got {bad!r}")
    m = pf.shape[0]
    if m == 0:
        return out
    c_m = by_divisor(m) if kind is FDRMethod.BY else 1.0
    order = np.argsort(pf, kind="stable")
    ranks = np.arange(1, m + 1, dtype=np.float64)
    raw = pf[order] * (c_m * m) / ranks
    adj = np.minimum.accumulate(raw[::-1])[::-1]
    adj = np.minimum(adj, 1.0)
    q = np.empty(m)
    q[order] = adj
    out[finite] = q
    return out


def fdr_control(p_values: ArrayLike, q: float = 0.05, *, method: str = "bh") -> FDRResult:
    """Reject the hypotheses of a family at FDR level ``q`` (step-up procedure).

    Parameters
    ----------
    p_values : array_like of float, shape (m_all,)
        NaN entries are not tested (not rejected, not counted in m).
    q : float, default=0.05
        FDR level, a fraction in (0, 1).
    method : {'bh', 'by'}, default='bh'

    Returns
    -------
    FDRResult

    Raises
    ------
    ConfigError
        If ``q`` is not in (0, 1), ``method`` is unknown or a p-value is outside [0, 1].

    References
    ----------
    Benjamini & Hochberg (1995); Benjamini & Yekutieli (2001), see the module docstring.
    Agrees with ``statsmodels.stats.multitest.multipletests(method='fdr_bh' | 'fdr_by')``.
    """
    if not 0.0 < float(q) < 1.0:
        raise ConfigError(
            f"The 'q' parameter of fdr_control must be a float in the range (0, 1). Got {q} "
            "instead."
        )
    kind = _method(method)
    qv = fdr_adjust(p_values, method=kind.value)
    reject = np.zeros(qv.shape, dtype=bool)
    finite = ~np.isnan(qv)
    reject[finite] = qv[finite] <= q
    return FDRResult(
        reject=reject, q_value=qv, method=kind, level=float(q), n_tests=int(finite.sum())
    )
