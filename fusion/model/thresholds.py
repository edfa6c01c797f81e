"""Station detection thresholds when the noise level is not stored (docs/censoring.md §7, issue 7).

The censored fit (:mod:`fusion.model.censored_fit`) needs, for every non-detection, the noise
threshold t_ij on the station-magnitude scale. Where the store gives it (``noise_threshold``,
the pre-event noise through the same formula) it is used as is. Otherwise this module
estimates a per-station **detection curve**

    P(station i detects event j) = Φ((μ_ij − t_i(Δ_ij))/s_i),
    t_i(Δ) = t0_i + t1_i log10(Δ/Δ_ref),      μ_ij = M̂_j^(−i) + b̂_i,

where M̂_j^(−i) is the event magnitude without station i (so that the station's own error does
not enter the predictor), Δ the epicentral distance in km and Δ_ref = 10 km. Two estimators:

- **Probit** (:func:`fit_detection_curves`; Bliss 1934, Finney 1971 [from memory]) on the
  station's rows with a known outcome, detections and non-detections (stored rows say the
  station was operating): P = Φ(β0 + β1 μ + β2 L), L = log10(Δ/Δ_ref), fitted by Fisher
  scoring for all stations at once (3×3 systems solved in a batch). Then t0 = −β0/β1,
  t1 = −β2/β1, s = 1/β1; Cov(t0, t1) by the delta method from the inverse information. s
  includes σ_i, the soft-threshold width and the error of μ, so it is reported but the
  censored fit keeps its own σ_i (and the configured width). A station without distances gets
  t1 = 0 (two-parameter probit). Stations with fewer than ``min_detections`` detections or
  ``min_nondetections`` non-detections, with β1 <= 0 or without convergence get no curve.
- **Detections only** (:func:`curves_from_detections`), when no non-detection is stored. Under
  the Gutenberg–Richter law the magnitudes above a completeness level are exponential with
  rate β = b ln 10 whatever the level (memorylessness; the basis of Aki's 1965 estimator
  b = log10(e)/(mean M − Mc) [from memory]). For the readings a station reports at distance Δ,
  m − t_i(Δ) is then Exp(β) [derived: m = M + b + e with M ~ G–R, e normal, has an exponential
  tail far above M_min + b]: a least-squares line of m on L has slope t1 and intercept
  t0 + 1/β, and the residual SD is 1/β. So t0 = c0 − SD(residual), t1 = c1; Var(t0) ≈
  Var(c0) + 2 SD²/n (the variance of a sample SD of exponential data, kurtosis 9). Near
  stations that see every event above the catalogue minimum get t̂ ≈ M_min + b̂ >= t: a
  conservative (too high) threshold, harmless for the safe-cell rule below.

**Fallback without thresholds** (docs/censoring.md §8): fit station parameters only on **safe
cells**, detections with M̂_j^(−i) + b̂_i >= t̂_i(Δ) + 2σ̃_i (:func:`safe_cells`). Selecting on the
leave-one-out estimate does not select on e_ij, and selecting on M̂ does not bias b̂ or σ̂
(docs/estimator.md §6); residual bias comes only from the other stations' censoring. Small events
are then published with the flag ``likely-biased-high`` and their **expected detection bias**
(:func:`expected_detection_bias`): with α_i = (M + b_i − t_i)/σ_i,
E[e_i | detected] = σ_i λ(α_i), λ = φ/Φ (the truncated-normal mean, Johnson, Kotz &
Balakrishnan 1994 [from memory]; docs/check-values.md §7 check values), so a weighted mean of the
detections is biased by Σ_i w_i σ_i λ(α_i); M is found by the fixed point
M = M̂_det − bias(M) (the estimate minus its own expected bias), a few vectorized iterations.

Everything is vectorized over rows with ``np.bincount`` sums per station; loops run over
iterations only.

References
----------
Bibliographic details marked [from memory] were not re-read.

Aki K. (1965). Maximum likelihood estimate of b in the formula log N = a − bM and its
confidence limits. Bull. Earthq. Res. Inst. Tokyo Univ. 43:237–239 [from memory].
Bliss C. I. (1934). The method of probits. Science 79:38–39 [from memory].
Finney D. J. (1971). Probit Analysis, 3rd ed. Cambridge University Press [from memory].
Johnson N. L., Kotz S., Balakrishnan N. (1994). Continuous Univariate Distributions, vol. 1,
2nd ed., ch. 13 [from memory].
Ringdal F. (1976). Maximum-likelihood estimation of seismic magnitude. BSSA 66(3):789–802.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from fusion.network.censoring import inverse_mills_ratio
from fusion.observations import ObservationSet, index_of
from stations.errors import ConfigError, SchemaError

if TYPE_CHECKING:
    from fusion.model.parameters import StationParameters
    from fusion.network.network_magnitude import FusedMagnitudes

__all__ = [
    "CURVE_COLUMNS",
    "CurveMethod",
    "DetectionCurves",
    "curves_from_detections",
    "expected_detection_bias",
    "fit_detection_curves",
    "flag_detection_bias",
    "impute_thresholds",
    "safe_cells",
]

#: Reference distance of the curve intercept, km.
REFERENCE_KM: Final = 10.0
#: Columns of :meth:`DetectionCurves.table`.
CURVE_COLUMNS: Final = (
    "station_id",
    "method",
    "threshold_ref",
    "slope_per_decade",
    "scale",
    "threshold_ref_se",
    "var_intercept",
    "cov_intercept_slope",
    "var_slope",
    "n_cells",
    "n_detected",
    "reference_km",
)


class CurveMethod(StrEnum):
    """How a station's detection curve was obtained."""

    none = "none"  #: no curve (too few data, or the fit failed)
    probit = "probit"  #: probit on detections and non-detections
    detections = "detections"  #: exponential (G–R) envelope of the detections only


@dataclass(frozen=True, slots=True, eq=False)
class DetectionCurves:
    """Per-station detection curves t_i(Δ) = t0_i + t1_i log10(Δ/Δ_ref) (module docstring).

    Attributes
    ----------
    station_ids : ndarray of str, shape (K,)
        Station (or unit) ids; curves follow this order.
    method : ndarray of str, shape (K,)
        :class:`CurveMethod` value per station.
    intercept : ndarray, shape (K,)
        t0_i, the threshold at ``reference_km`` (magnitude units); NaN without a curve.
    slope : ndarray, shape (K,)
        t1_i, magnitude units per decade of distance.
    scale : ndarray, shape (K,)
        s_i of the probit (magnitude units); NaN for the detections-only curve.
    covariance : ndarray, shape (K, 2, 2)
        Cov(t0_i, t1_i), magnitude units squared.
    n_cells, n_detected : ndarray of int, shape (K,)
        Rows used and detections among them.
    reference_km : float
        Δ_ref, km.
    """

    station_ids: NDArray[Any]
    method: NDArray[Any]
    intercept: NDArray[np.float64]
    slope: NDArray[np.float64]
    scale: NDArray[np.float64]
    covariance: NDArray[np.float64]
    n_cells: NDArray[np.int64]
    n_detected: NDArray[np.int64]
    reference_km: float = REFERENCE_KM

    @property
    def n_stations(self) -> int:
        """K, the number of stations."""
        return int(self.station_ids.shape[0])

    @property
    def fitted(self) -> NDArray[np.bool_]:
        """Stations with a curve."""
        return np.asarray(self.method != CurveMethod.none.value, dtype=bool)

    def _log_distance(self, station: NDArray[np.int64], distance_km: ArrayLike) -> Any:
        d = np.asarray(distance_km, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            L = np.log10(d / self.reference_km)
        # A station without a distance term needs no distance.
        return np.where(self.slope[station] == 0.0, 0.0, L)

    def threshold(self, station: ArrayLike, distance_km: ArrayLike) -> NDArray[np.float64]:
        """t̂_i(Δ) for each (station code, distance in km); NaN without curve or distance."""
        st = np.asarray(station, dtype=np.int64)
        L = self._log_distance(st, distance_km)
        return np.asarray(self.intercept[st] + self.slope[st] * L, dtype=np.float64)

    def threshold_se(self, station: ArrayLike, distance_km: ArrayLike) -> NDArray[np.float64]:
        """SE of t̂_i(Δ) from Cov(t0, t1) (magnitude units)."""
        st = np.asarray(station, dtype=np.int64)
        L = self._log_distance(st, distance_km)
        cv = self.covariance[st]
        var = cv[:, 0, 0] + 2.0 * L * cv[:, 0, 1] + L * L * cv[:, 1, 1]
        return np.asarray(np.sqrt(np.maximum(var, 0.0)), dtype=np.float64)

    def reindex(self, station_ids: ArrayLike) -> DetectionCurves:
        """The curves in the order of ``station_ids`` (e.g. the raw station table of new data).

        A requested station id takes the curve of its latest unit (the station itself, or its
        latest epoch ``id@YYYY-MM-DD``, unit ids of :mod:`fusion.model.parameters`): thresholds
        live on
        the station-magnitude scale, which an epoch split of the bias does not move. Stations
        without a unit get no curve.
        """
        want = np.asarray(station_ids).astype(str)
        have = np.asarray(self.station_ids).astype(str)
        if have.size == 0:
            return DetectionCurves(**_empty_curves(want.astype(object), self.reference_km))
        base = np.char.partition(have, "@")[:, 0]
        # Latest unit per station: within a station, ids sort by the start date after '@'.
        order = np.lexsort((have, base))
        last = order[np.r_[base[order][1:] != base[order][:-1], True]]
        pos = index_of(base[last], np.char.partition(want, "@")[:, 0] if want.size else want)
        src = np.where(pos >= 0, last[np.maximum(pos, 0)], -1)
        ok = src >= 0
        s = np.maximum(src, 0)
        K = want.shape[0]
        return DetectionCurves(
            station_ids=want.astype(object),
            method=np.where(ok, self.method[s], CurveMethod.none.value).astype(object),
            intercept=np.where(ok, self.intercept[s], np.nan),
            slope=np.where(ok, self.slope[s], 0.0),
            scale=np.where(ok, self.scale[s], np.nan),
            covariance=np.where(ok[:, None, None], self.covariance[s], np.nan).reshape(K, 2, 2),
            n_cells=np.where(ok, self.n_cells[s], 0),
            n_detected=np.where(ok, self.n_detected[s], 0),
            reference_km=self.reference_km,
        )

    def table(self) -> pd.DataFrame:
        """One row per station, columns :data:`CURVE_COLUMNS` (for the model version)."""
        cv = self.covariance
        return pd.DataFrame(
            {
                "station_id": self.station_ids.astype(str),
                "method": self.method.astype(str),
                "threshold_ref": self.intercept,
                "slope_per_decade": self.slope,
                "scale": self.scale,
                "threshold_ref_se": np.sqrt(np.maximum(cv[:, 0, 0], 0.0)),
                "var_intercept": cv[:, 0, 0],
                "cov_intercept_slope": cv[:, 0, 1],
                "var_slope": cv[:, 1, 1],
                "n_cells": self.n_cells,
                "n_detected": self.n_detected,
                "reference_km": np.full(self.n_stations, float(self.reference_km)),
            },
            columns=list(CURVE_COLUMNS),
        )

    @classmethod
    def from_table(cls, table: pd.DataFrame) -> DetectionCurves:
        """Rebuild from :meth:`table` output.

        Raises
        ------
        SchemaError
            If a column of :data:`CURVE_COLUMNS` is missing.
        """
        missing = [c for c in CURVE_COLUMNS if c not in table.columns]
        if missing:
            raise SchemaError(
                f"detection-curve table lacks column(s) {', '.join(missing)}; "
                "write it with DetectionCurves.table()"
            )
        K = len(table)
        cov = np.zeros((K, 2, 2))
        cov[:, 0, 0] = table["var_intercept"].to_numpy(float)
        cov[:, 0, 1] = cov[:, 1, 0] = table["cov_intercept_slope"].to_numpy(float)
        cov[:, 1, 1] = table["var_slope"].to_numpy(float)
        ref = table["reference_km"].to_numpy(float)
        return cls(
            station_ids=table["station_id"].astype(str).to_numpy(dtype=object),
            method=table["method"].astype(str).to_numpy(dtype=object),
            intercept=table["threshold_ref"].to_numpy(float),
            slope=table["slope_per_decade"].to_numpy(float),
            scale=table["scale"].to_numpy(float),
            covariance=cov,
            n_cells=table["n_cells"].to_numpy(np.int64),
            n_detected=table["n_detected"].to_numpy(np.int64),
            reference_km=float(ref[0]) if K else REFERENCE_KM,
        )


def _empty_curves(station_ids: NDArray[Any], reference_km: float) -> dict[str, Any]:
    K = station_ids.shape[0]
    return {
        "station_ids": np.asarray(station_ids, dtype=object),
        "method": np.full(K, CurveMethod.none.value, dtype=object),
        "intercept": np.full(K, np.nan),
        "slope": np.zeros(K),
        "scale": np.full(K, np.nan),
        "covariance": np.full((K, 2, 2), np.nan),
        "n_cells": np.zeros(K, dtype=np.int64),
        "n_detected": np.zeros(K, dtype=np.int64),
        "reference_km": float(reference_km),
    }


def _check_positive(name: str, value: float, where: str) -> None:
    if not (isinstance(value, int | float) and np.isfinite(value) and value > 0):
        raise ConfigError(
            f"The {name!r} parameter of {where} must be a float in the range (0, inf). "
            f"Got {value!r} instead."
        )


def _log_distance_rows(
    distance_km: NDArray[np.float64], station: NDArray[np.int64], K: int, reference_km: float
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """L = log10(Δ/Δ_ref) per row, and per station whether every used row has a distance."""
    with np.errstate(invalid="ignore", divide="ignore"):
        L = np.log10(distance_km / reference_km)
    finite = np.isfinite(L)
    n_bad = np.bincount(station[~finite], minlength=K)
    uses_distance = n_bad == 0
    L = np.where(uses_distance[station] & finite, L, 0.0)
    return L, uses_distance


# ------------------------------------------------------------------------------------------
# Probit curves
# ------------------------------------------------------------------------------------------


def fit_detection_curves(
    obs: ObservationSet,
    predictor: ArrayLike,
    *,
    rows: ArrayLike | None = None,
    reference_km: float = REFERENCE_KM,
    min_detections: int = 10,
    min_nondetections: int = 10,
    max_iter: int = 50,
    tol: float = 1e-8,
) -> DetectionCurves:
    """Per-station probit detection curves (module docstring), all stations at once.

    Parameters
    ----------
    obs : ObservationSet
        Detections and non-detections (stored rows: the station was operating).
    predictor : array_like of float, shape (nnz,)
        μ_ij = M̂_j^(−i) + b̂_i for every row (magnitude units); rows with a non-finite value
        are not used.
    rows : array_like of bool, shape (nnz,), optional
        Rows allowed in the fit (default: all rows with a finite predictor). Clipped rows are
        always detections.
    reference_km : float, default=10.0
        Δ_ref of the intercept, km.
    min_detections, min_nondetections : int, default=10
        A station needs at least this many of each to get a curve.
    max_iter : int, default=50
        Fisher-scoring iterations at most.
    tol : float, default=1e-8
        Convergence when every coefficient step is below this.

    Returns
    -------
    DetectionCurves
        ``method`` is ``"probit"`` for fitted stations, ``"none"`` elsewhere.

    Raises
    ------
    ConfigError
        ``predictor`` or ``rows`` do not match ``obs``, or a parameter is out of range.
    """
    _check_positive("reference_km", reference_km, "fit_detection_curves")
    mu = np.asarray(predictor, dtype=np.float64)
    if mu.shape != (obs.n_obs,):
        raise ConfigError(
            f"predictor must hold one value per row of the observations ({obs.n_obs}); "
            f"got shape {mu.shape}"
        )
    use = np.isfinite(mu)
    if rows is not None:
        mask = np.asarray(rows, dtype=bool)
        if mask.shape != (obs.n_obs,):
            raise ConfigError(f"rows must be a mask of {obs.n_obs} rows; got shape {mask.shape}")
        use &= mask
    K = obs.n_stations
    out = _empty_curves(obs.station_ids, reference_km)
    idx = np.flatnonzero(use)
    st = obs.station[idx]
    y = obs.detected[idx].astype(np.float64)
    n_cells = np.bincount(st, minlength=K)
    n_det = np.bincount(st, weights=y, minlength=K).astype(np.int64)
    out["n_cells"] = n_cells.astype(np.int64)
    out["n_detected"] = n_det
    eligible = (n_det >= min_detections) & (n_cells - n_det >= min_nondetections)
    keep = eligible[st]
    idx, st, y = idx[keep], st[keep], y[keep]
    if idx.shape[0] == 0:
        return DetectionCurves(**out)
    L, uses_distance = _log_distance_rows(obs.distance_km[idx], st, K, reference_km)
    X = np.column_stack([np.ones(idx.shape[0]), mu[idx], L])  # (n, 3)
    # Start: s = 0.3, t at the station's median predictor, no distance term.
    med = np.zeros(K)
    order = np.lexsort((mu[idx], st))
    counts = np.bincount(st, minlength=K)
    first = np.concatenate([[0], np.cumsum(counts)[:-1]])
    has = counts > 0
    med[has] = mu[idx][order][first[has] + counts[has] // 2]
    beta = np.zeros((K, 3))
    beta[:, 1] = 1.0 / 0.3
    beta[:, 0] = -med / 0.3
    free_slope = uses_distance & eligible
    converged = np.zeros(K, dtype=bool)
    info = np.zeros((K, 3, 3))
    for _ in range(max_iter):
        eta = np.einsum("ij,ij->i", X, beta[st])
        lam_p = inverse_mills_ratio(eta)  # φ/Φ
        lam_n = inverse_mills_ratio(-eta)  # φ/(1 − Φ)
        score = np.where(y > 0, lam_p, -lam_n)
        w = lam_p * lam_n  # Fisher weight φ²/(Φ(1 − Φ))
        grad = np.stack(
            [np.bincount(st, weights=score * X[:, a], minlength=K) for a in range(3)], axis=1
        )
        info = np.empty((K, 3, 3))
        for a in range(3):
            for b in range(a, 3):
                v = np.bincount(st, weights=w * X[:, a] * X[:, b], minlength=K)
                info[:, a, b] = info[:, b, a] = v
        # Stations without a distance term: fix β2 = 0.
        fixed = ~free_slope
        info[fixed, 2, :] = 0.0
        info[fixed, :, 2] = 0.0
        info[fixed, 2, 2] = 1.0
        grad[fixed, 2] = 0.0
        solvable = eligible & (np.abs(np.linalg.det(info)) > 0)
        step = np.zeros((K, 3))
        step[solvable] = np.linalg.solve(info[solvable], grad[solvable][:, :, None])[:, :, 0]
        # Damp steps that would flip the magnitude coefficient's sign.
        big = np.abs(step[:, 1]) > 0.5 * np.abs(beta[:, 1])
        factor = np.where(
            big, 0.5 * np.abs(beta[:, 1]) / np.maximum(np.abs(step[:, 1]), 1e-300), 1.0
        )
        step *= factor[:, None]
        beta += step
        converged = eligible & (np.max(np.abs(step), axis=1) < tol)
        if np.all(converged | ~eligible):
            break
    ok = converged & (beta[:, 1] > 0) & np.all(np.isfinite(beta), axis=1)
    if not np.any(ok):
        return DetectionCurves(**out)
    cov_beta = np.full((K, 3, 3), np.nan)
    cov_beta[ok] = np.linalg.inv(info[ok])
    cov_beta[ok & ~free_slope, 2, :] = 0.0
    cov_beta[ok & ~free_slope, :, 2] = 0.0
    b0, b1, b2 = beta[:, 0], beta[:, 1], beta[:, 2]
    with np.errstate(invalid="ignore", divide="ignore"):
        t0, t1, s = -b0 / b1, -b2 / b1, 1.0 / b1
        # Jacobian of (t0, t1) with respect to (β0, β1, β2).
        J = np.zeros((K, 2, 3))
        J[:, 0, 0] = -1.0 / b1
        J[:, 0, 1] = b0 / (b1 * b1)
        J[:, 1, 1] = b2 / (b1 * b1)
        J[:, 1, 2] = -1.0 / b1
    cov_t = np.einsum("kab,kbc,kdc->kad", J, np.nan_to_num(cov_beta), J)
    out["method"] = np.where(ok, CurveMethod.probit.value, CurveMethod.none.value).astype(object)
    out["intercept"] = np.where(ok, t0, np.nan)
    out["slope"] = np.where(ok, t1, 0.0)
    out["scale"] = np.where(ok, s, np.nan)
    out["covariance"] = np.where(ok[:, None, None], cov_t, np.nan)
    return DetectionCurves(**out)


# ------------------------------------------------------------------------------------------
# Detections-only curves
# ------------------------------------------------------------------------------------------


def curves_from_detections(
    obs: ObservationSet,
    *,
    reference_km: float = REFERENCE_KM,
    min_detections: int = 30,
) -> DetectionCurves:
    """Per-station threshold lines from the detections alone (module docstring).

    Parameters
    ----------
    obs : ObservationSet
        Station magnitudes; detected, unclipped rows with a finite magnitude are used.
    reference_km : float, default=10.0
        Δ_ref of the intercept, km.
    min_detections : int, default=30
        A station needs at least this many readings to get a curve.

    Returns
    -------
    DetectionCurves
        ``method`` is ``"detections"`` for fitted stations; ``scale`` is NaN.
    """
    _check_positive("reference_km", reference_km, "curves_from_detections")
    K = obs.n_stations
    out = _empty_curves(obs.station_ids, reference_km)
    use = obs.detected & ~obs.clipped & np.isfinite(obs.magnitude)
    idx = np.flatnonzero(use)
    st = obs.station[idx]
    m = obs.magnitude[idx]
    L, uses_distance = _log_distance_rows(obs.distance_km[idx], st, K, reference_km)
    n = np.bincount(st, minlength=K).astype(np.float64)
    out["n_cells"] = n.astype(np.int64)
    out["n_detected"] = n.astype(np.int64)
    sL = np.bincount(st, weights=L, minlength=K)
    sLL = np.bincount(st, weights=L * L, minlength=K)
    sm = np.bincount(st, weights=m, minlength=K)
    smL = np.bincount(st, weights=m * L, minlength=K)
    ok = n >= max(min_detections, 3)
    with np.errstate(invalid="ignore", divide="ignore"):
        Lbar, mbar = sL / n, sm / n
        sxx = sLL - n * Lbar * Lbar
        slope = np.where(uses_distance & (sxx > 1e-12 * n), (smL - n * Lbar * mbar) / sxx, 0.0)
        c0 = mbar - slope * Lbar
    resid = m - c0[st] - slope[st] * L
    p = np.where(slope != 0.0, 2.0, 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rss = np.bincount(st, weights=resid * resid, minlength=K)
        sd = np.sqrt(rss / (n - p))
        var_res = sd * sd
        v_c0 = var_res * (1.0 / n + np.where(slope != 0.0, Lbar * Lbar / sxx, 0.0))
        v_c1 = np.where(slope != 0.0, var_res / sxx, 0.0)
        c01 = np.where(slope != 0.0, -Lbar * var_res / sxx, 0.0)
    ok &= np.isfinite(sd) & (sd > 0)
    cov = np.zeros((K, 2, 2))
    cov[:, 0, 0] = v_c0 + 2.0 * var_res / np.maximum(n, 1.0)
    cov[:, 0, 1] = cov[:, 1, 0] = c01
    cov[:, 1, 1] = v_c1
    out["method"] = np.where(ok, CurveMethod.detections.value, CurveMethod.none.value).astype(
        object
    )
    out["intercept"] = np.where(ok, c0 - sd, np.nan)
    out["slope"] = np.where(ok, slope, 0.0)
    out["covariance"] = np.where(ok[:, None, None], cov, np.nan)
    return DetectionCurves(**out)


# ------------------------------------------------------------------------------------------
# Using the curves
# ------------------------------------------------------------------------------------------


def impute_thresholds(
    obs: ObservationSet, curves: DetectionCurves
) -> tuple[ObservationSet, NDArray[np.bool_]]:
    """Fill missing thresholds of non-detections from probit curves.

    Parameters
    ----------
    obs : ObservationSet
    curves : DetectionCurves
        Curves on the station table of ``obs``.

    Returns
    -------
    observations : ObservationSet
        A copy whose non-detection rows without a threshold carry t̂_i(Δ_ij) where the
        station has a probit curve (and the row a distance, if the curve uses one). Stored
        thresholds are never changed.
    imputed : ndarray of bool, shape (nnz,)
        The rows that received an estimated threshold.

    Raises
    ------
    ConfigError
        If the curves are for another station table.
    """
    if curves.n_stations != obs.n_stations or not np.array_equal(
        np.asarray(curves.station_ids).astype(str), np.asarray(obs.station_ids).astype(str)
    ):
        raise ConfigError(
            "detection curves and observations have different station tables; fit the "
            "curves on the same observations"
        )
    need = ~obs.detected & ~np.isfinite(obs.threshold)
    probit = curves.method == CurveMethod.probit.value
    need &= probit[obs.station]
    rows = np.flatnonzero(need)
    t = curves.threshold(obs.station[rows], obs.distance_km[rows])
    good = np.isfinite(t)
    rows = rows[good]
    thr = obs.threshold.copy()
    thr[rows] = t[good]
    imputed = np.zeros(obs.n_obs, dtype=bool)
    imputed[rows] = True
    new = ObservationSet(
        magnitude_type=obs.magnitude_type,
        event_ids=obs.event_ids,
        event_time=obs.event_time,
        station_ids=obs.station_ids,
        event=obs.event,
        station=obs.station,
        magnitude=obs.magnitude,
        detected=obs.detected,
        clipped=obs.clipped,
        threshold=thr,
        distance_km=obs.distance_km,
    )
    return new, imputed


def safe_cells(
    obs: ObservationSet,
    curves: DetectionCurves,
    predictor: ArrayLike,
    sigma: ArrayLike,
    *,
    margin_sd: float = 2.0,
) -> NDArray[np.bool_]:
    """Detections far enough above their station's threshold to be free of censoring.

    A detection is safe when μ_ij = M̂_j^(−i) + b̂_i >= t̂_i(Δ_ij) + ``margin_sd`` σ̃_i
    (docs/censoring.md §8); at that level the station detects with probability Φ(margin_sd) (0.977
    for 2), so the reading is hardly selected on its error.

    Parameters
    ----------
    obs : ObservationSet
    curves : DetectionCurves
        On the station table of ``obs``.
    predictor : array_like, shape (nnz,)
        μ_ij of each row (NaN where undefined), e.g.
        :func:`fusion.model.censored_fit.loo_predictor`.
    sigma : array_like, shape (K,)
        σ̃_i of the station units of ``obs``.
    margin_sd : float, default=2.0
        Margin in units of σ̃_i.

    Returns
    -------
    ndarray of bool, shape (nnz,)
        True for safe detections; False for other rows, for stations without a curve and for
        rows without a predictor.
    """
    _check_positive("margin_sd", margin_sd, "safe_cells")
    s = np.asarray(sigma, dtype=np.float64)
    mu = np.asarray(predictor, dtype=np.float64)
    t = curves.threshold(obs.station, obs.distance_km)
    with np.errstate(invalid="ignore"):
        ok = mu >= t + margin_sd * s[obs.station]
    return np.asarray(ok & obs.detected & np.isfinite(t) & np.isfinite(mu), dtype=bool)


def expected_detection_bias(
    event: ArrayLike,
    weight: ArrayLike,
    bias: ArrayLike,
    sigma: ArrayLike,
    threshold: ArrayLike,
    magnitude: ArrayLike,
    *,
    n_iter: int = 5,
) -> NDArray[np.float64]:
    """Expected bias of a weighted mean of detections, E[M̂_det − M] (module docstring).

    Parameters
    ----------
    event : array_like of int, shape (n,)
        Event code of each detection (codes index ``magnitude``).
    weight : array_like, shape (n,)
        Normalised weight of each detection in its event's estimate.
    bias, sigma, threshold : array_like, shape (n,)
        b̂_i, σ̃_i and t̂_i(Δ_ij) of each detection (magnitude units); a NaN threshold means
        "never censored" (the row adds nothing).
    magnitude : array_like, shape (N,)
        M̂_det, the detections-only estimate of each event (magnitude units).
    n_iter : int, default=5
        Fixed-point iterations M ← M̂_det − bias(M) (each vectorized over all events). The
        fixed point exists when M̂_det lies above the weighted thresholds Σ w (t − b); an event
        whose only detection sits at its threshold has none (its bias is not bounded by the
        data), and the value after ``n_iter`` iterations is then a lower bound. On the censor
        simulation (docs/simulation.md §2) five iterations predict the detected-only bias per
        magnitude bin within 0.012 (tests/fusion/model/test_thresholds.py).

    Returns
    -------
    ndarray, shape (N,)
        Expected bias in magnitude units (>= 0); 0 for events without detections.

    Examples
    --------
    One station, σ = 0.2, threshold one σ above M + b: E[e | e > 0.2] with e ~ N(0, 0.2²) is
    0.2 λ(−1) = 0.2 φ(1)/(1 − Φ(1)) = 0.30503 (truncated-normal mean; Johnson, Kotz &
    Balakrishnan 1994, ch. 13; scipy ``0.2 * truncnorm.mean(1, inf)`` gives the same):

    >>> b = expected_detection_bias([0], [1.0], [0.0], [0.2], [1.2], [1.0], n_iter=0)
    >>> round(float(b[0]), 5)
    0.30503
    """
    ev = np.asarray(event, dtype=np.int64)
    w = np.asarray(weight, dtype=np.float64)
    b = np.asarray(bias, dtype=np.float64)
    s = np.asarray(sigma, dtype=np.float64)
    t = np.asarray(threshold, dtype=np.float64)
    m_det = np.asarray(magnitude, dtype=np.float64)
    N = m_det.shape[0]
    live = np.isfinite(t) & np.isfinite(w) & (s > 0)
    ev_l, w_l, b_l, s_l, t_l = ev[live], w[live], b[live], s[live], t[live]

    def bias_at(M: NDArray[np.float64]) -> NDArray[np.float64]:
        alpha = (M[ev_l] + b_l - t_l) / s_l
        return np.asarray(
            np.bincount(ev_l, weights=w_l * s_l * inverse_mills_ratio(alpha), minlength=N),
            dtype=np.float64,
        )

    M = m_det.copy()
    out = bias_at(M)
    for _ in range(int(n_iter)):
        M = m_det - out
        out = bias_at(M)
    out[~np.isfinite(m_det)] = 0.0
    return out


def flag_detection_bias(
    fused: FusedMagnitudes,
    obs: ObservationSet,
    params: StationParameters,
    curves: DetectionCurves,
    *,
    min_bias: float = 0.05,
) -> FusedMagnitudes:
    """Add the expected detection bias and the ``likely-biased-high`` flag to fused events.

    For events whose magnitude did not use the censored likelihood (no ``censoring-used``
    flag), :func:`expected_detection_bias` is computed from the detections' weights, the
    station parameters and the curves; events with an expected bias of at least ``min_bias``
    get the flag :attr:`fusion.network.network_magnitude.EventFlag.likely_biased_high`.

    Parameters
    ----------
    fused : FusedMagnitudes
        :func:`fusion.network.network_magnitude.fuse_events` output for ``obs``.
    obs : ObservationSet
        The observations that were fused (its station table is raw ``NET.STA.LOC`` ids).
    params : StationParameters
        The model they were fused with.
    curves : DetectionCurves
        Curves whose ``station_ids`` are station (or unit) ids of ``params``.
    min_bias : float, default=0.05
        Flag threshold, magnitude units.

    Returns
    -------
    FusedMagnitudes
        A copy with the event-table column ``expected_detection_bias`` (magnitude units; 0
        where nothing is censored, NaN for events that used the censored likelihood) and the
        flag added.
    """
    from fusion.network.network_magnitude import EstimateMethod, EventFlag, FusedMagnitudes

    _check_positive("min_bias", min_bias, "flag_detection_bias")
    ev_tab = fused.events
    co = fused.contributions
    det = co["detected"].to_numpy(bool) & np.isfinite(co["weight"].to_numpy(float))
    det &= co["weight"].to_numpy(float) > 0
    rows = np.flatnonzero(det)
    ev = obs.event[rows]
    curve_ids = np.asarray(curves.station_ids).astype(str)
    unit = co["unit_id"].astype(object).to_numpy()[rows]
    station = np.asarray(obs.station_ids).astype(str)[obs.station[rows]]
    key = np.where(pd.isna(unit), station, unit).astype(str)
    lookup = index_of(curve_ids, key)
    fallback = index_of(curve_ids, station)
    code = np.where(lookup >= 0, lookup, fallback)
    par_idx = index_of(np.asarray(params.unit_ids).astype(str), key)
    has = (code >= 0) & (par_idx >= 0)
    t = np.full(rows.shape[0], np.nan)
    t[has] = curves.threshold(code[has], obs.distance_km[rows][has])
    b = np.where(par_idx >= 0, params.bias[np.maximum(par_idx, 0)], 0.0)
    s = np.where(par_idx >= 0, np.sqrt(params.sigma2[np.maximum(par_idx, 0)]), np.sqrt(params.s0_2))
    w = co["weight"].to_numpy(float)[rows]
    M = ev_tab["magnitude"].to_numpy(float)
    size = expected_detection_bias(ev, w, b, s, t, M)
    flags = ev_tab["flags"].astype(str).to_numpy()
    censored = ev_tab["method"].astype(str).to_numpy() == str(EstimateMethod.censored_likelihood)
    size = np.where(censored, np.nan, size)
    hit = ~censored & (size >= min_bias)
    name = str(EventFlag.likely_biased_high)
    new_flags = np.where(
        hit,
        np.where(flags == "", name, np.char.add(np.char.add(flags.astype(str), ";"), name)),
        flags,
    )
    events = ev_tab.assign(expected_detection_bias=size, flags=new_flags.astype(object))
    return FusedMagnitudes(events=events, contributions=co)
