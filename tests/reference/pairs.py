"""Check values for correlated pairs, FDR control, CUSUM epochs and label-free validation.

Each block names its source and status with the labels of docs/check-values.md: **verified**
(read in the source or run in the named library), **computed** (from a verified formula; the
tests recompute it), **from memory** (not re-read), **derived** (short derivation in docs/,
re-checked in review).
"""

from __future__ import annotations

# --- docs/pairs.md §6 table / docs/worked-examples.md E11: overlap for 80 % power -----------------
# n = ceil(((z_{1−α/2} + z_{0.8}) / atanh ρ)² + 3). Status: computed (the tests recompute it
# with scipy.stats.norm.ppf); the Fisher-z approximation itself is Fisher (1921) [from memory].
E11_RHO = (0.2, 0.3, 0.5, 0.7)
E11_N_ALPHA_005 = (194, 85, 30, 14)
E11_N_ALPHA_0001 = (419, 182, 60, 26)

# --- docs/check-values.md §7: Benjamini–Yekutieli divisor -----------------------------------------
# Σ_{i≤10} 1/i = 2.928968. Status: verified (statsmodels `fdrcorrection` documentation) and
# computed. Tolerance 1e-6 (printed to 6 decimals).
BY_DIVISOR_M10 = 2.928968

# --- Benjamini & Hochberg (1995), JRSS-B 57(1):289–300, worked example (section 4) ---------------
# Fifteen p-values from a myocardial-infarction trial; at q = 0.05 the step-up procedure rejects
# the four smallest, Bonferroni only three. Status: from memory (values and counts not re-read);
# the tests also check the same numbers against statsmodels `multipletests` (verified library).
BH1995_P = (
    0.0001,
    0.0004,
    0.0019,
    0.0095,
    0.0201,
    0.0278,
    0.0298,
    0.0344,
    0.0459,
    0.3240,
    0.4262,
    0.5719,
    0.6528,
    0.7590,
    1.0000,
)
BH1995_N_REJECT_BH = 4
BH1995_N_REJECT_BONFERRONI = 3


# --- docs/worked-examples.md E4: null correlation of residuals, n equal stations ------------------
# All-station GLS residuals: −1/(n−1); leave-two-out residuals: +1/(n−1). Status: derived
# (Cov(r) = σ²(I − J/n); leave-two-out Cov(u_k, u_l) = Var(ē_O) = σ²/(n−2)); the tests
# recompute both from the covariance matrices with numpy.
def e4_all_station(n: int) -> float:
    """−1/(n−1)."""
    return -1.0 / (n - 1)


def e4_leave_two_out(n: int) -> float:
    """+1/(n−1)."""
    return 1.0 / (n - 1)


# --- CUSUM in-control run length: Siegmund (1985) approximation --------------------------------
# One-sided ARL0 of S_t = max(0, S_{t−1} + x_t − k), x ~ N(0, 1), alarm at h:
# (exp(2kb) − 2kb − 1)/(2k²), b = h + 1.166. Two-sided (independent sides): 1/(1/A + 1/A) = A/2.
# Status: from memory (Siegmund, Sequential Analysis, 1985); the approximation is known to be
# within a few percent for k = 0.5 [from memory]. Values computed: h = 5 → 938.3 one-sided,
# 469.1 two-sided; h = 8 → 1.91e4 one-sided, 9.57e3 two-sided.
def siegmund_arl0(k: float, h: float) -> float:
    """One-sided in-control ARL of a CUSUM on N(0, 1), Siegmund's approximation."""
    import math

    b = h + 1.166
    return (math.exp(2.0 * k * b) - 2.0 * k * b - 1.0) / (2.0 * k * k)


# --- Yellowstone ML (Holt, Pechmann & Koper 2022, BSSA 112(2):905–920), data set of ------------
# tests/data/yellowstone-uuss (MIT). Station WY.YNR: the network's station correction
# `Corr` is 0.00 for readings up to 2009-01-01 10:13 and 0.35 from 2009-01-02 01:21 (read from the
# file: 136 and 817 rows). Its published station ML (`SML`, correction included) therefore steps
# by +0.35 between the two; the uncorrected SML − Corr does not. Status: verified (read from the
# data file).
YNR_STATION = "WY.YNR."
YNR_CORRECTION_CHANGE = "2009-01-02T00:00:00"
YNR_CORRECTION_STEP = 0.35
