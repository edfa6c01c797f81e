"""Which use of the non-detections a station model makes: the modes and the threshold rounds.

This is orchestration, not numerics: :class:`fusion.model.station_model.StationModel` calls
:func:`refit_with_nondetections`, which decides between the joint censored fit with stored
thresholds, rounds of estimated thresholds and joint fit, the safe-cell fallback, or nothing,
and runs the numerical pieces: :func:`fusion.model.censored_fit.fit_censored_stations`,
:mod:`fusion.model.thresholds` and :func:`fusion.model.censored_fit.loo_predictor`. The
method is described in docs/censoring.md.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from fusion.model.anchors import Anchor
from fusion.model.censored_fit import (
    CensoredStationFit,
    censoring_rows,
    fit_censored_stations,
    loo_predictor,
)
from fusion.model.reml_em import RemlEmFit
from fusion.observations import ObservationSet
from stations.errors import ConfigError

if TYPE_CHECKING:
    from fusion.model.thresholds import DetectionCurves

__all__ = ["NondetectionMode", "NondetectionOutcome", "refit_with_nondetections"]


class NondetectionMode(StrEnum):
    """How a station model used the non-detections (:func:`refit_with_nondetections`)."""

    unused = "unused"  #: no censoring information (or switched off): detections only
    known_thresholds = "known-thresholds"  #: joint fit with the stored thresholds
    estimated_thresholds = "estimated-thresholds"  #: joint fit, missing thresholds estimated
    safe_cells = "safe-cells"  #: no thresholds: fit on safe cells only (docs/censoring.md §8)


@dataclass(frozen=True, slots=True, eq=False)
class NondetectionOutcome:
    """What :func:`refit_with_nondetections` did.

    Attributes
    ----------
    mode : NondetectionMode
    fit : RemlEmFit
        The fit to hand on (the warm start itself when ``mode`` is ``unused``), on the rows of
        the observations given.
    censored : CensoredStationFit or None
        The joint fit (known or estimated thresholds).
    curves : DetectionCurves or None
        Detection curves (estimated thresholds, or the safe-cell fallback).
    observations : ObservationSet
        The observations with imputed thresholds (the input otherwise).
    n_nondetections : int
        Non-detections in the final censored set C.
    n_imputed : int
        Non-detections that received an estimated threshold.
    n_safe : int
        Detections kept by the safe-cell rule (0 unless ``mode`` is ``safe-cells``).
    rounds : int
        Threshold-estimation rounds run.
    """

    mode: NondetectionMode
    fit: RemlEmFit
    censored: CensoredStationFit | None
    curves: DetectionCurves | None
    observations: ObservationSet
    n_nondetections: int = 0
    n_imputed: int = 0
    n_safe: int = 0
    rounds: int = 0

    @classmethod
    def skipped(cls, obs: ObservationSet, fit: RemlEmFit) -> NondetectionOutcome:
        """Non-detections not used (switched off): the detections-only fit is handed on."""
        return cls(
            mode=NondetectionMode.unused, fit=fit, censored=None, curves=None, observations=obs
        )

    def summary(self) -> dict[str, Any]:
        """JSON-ready counts for the model version's metadata."""
        cf = self.censored
        return {
            "mode": str(self.mode),
            "n_nondetections_used": int(self.n_nondetections),
            "n_thresholds_estimated": int(self.n_imputed),
            "n_safe_cells": int(self.n_safe),
            "threshold_rounds": int(self.rounds),
            "n_stations_with_curve": 0 if self.curves is None else int(self.curves.fitted.sum()),
            "censored_fit_iterations": None if cf is None else int(cf.n_iter),
            "censored_fit_converged": None if cf is None else bool(cf.converged),
        }


def _expand_rows(fit: RemlEmFit, rows: NDArray[np.int64], n_obs: int) -> RemlEmFit:
    """A fit made on a row subset, with its row arrays placed on the full row table."""

    def place(x: NDArray[np.float64]) -> NDArray[np.float64]:
        out = np.full(n_obs, np.nan)
        out[rows] = x
        return out

    return dataclasses.replace(
        fit,
        row_weight=place(fit.row_weight),
        row_gls_weight=place(fit.row_gls_weight),
        residual=place(fit.residual),
    )


def refit_with_nondetections(
    obs: ObservationSet,
    start: RemlEmFit,
    *,
    anchor: Anchor,
    gamma: NDArray[np.float64] | None = None,
    unit_station: NDArray[Any] | None = None,
    refit: Callable[[ObservationSet], RemlEmFit] | None = None,
    soft_threshold_sd: float = 0.0,
    min_detection_probability: float = 0.01,
    estimate_thresholds: bool = True,
    threshold_rounds: int = 3,
    min_threshold_cells: int = 10,
    safe_cells_fallback: bool = False,
    safe_margin_sd: float = 2.0,
    max_iter: int = 200,
    tol_bias: float = 1e-4,
    tol_log_sigma: float = 1e-3,
) -> NondetectionOutcome:
    """Use the non-detections in the station fit as far as the data allow.

    1. Non-detections without a stored threshold (and ``estimate_thresholds``): probit
       detection curves (:func:`fusion.model.thresholds.fit_detection_curves`) on the
       leave-one-out predictor of the current fit (:func:`loo_predictor`), imputation of the
       missing thresholds, joint fit; ``threshold_rounds`` rounds, each starting its curves
       from the previous round's censored fit (measured on the censor simulation of
       docs/simulation.md §2 with hidden thresholds: mean threshold error +0.17, +0.08, +0.06,
       +0.05 after rounds 1–4). Mode ``estimated-thresholds``.
    2. Otherwise, with stored thresholds or clipped readings: one joint fit
       (:func:`fit_censored_stations`). Mode ``known-thresholds``.
    3. Otherwise, with ``safe_cells_fallback`` and a ``refit``: detection curves from the
       detections alone (:func:`fusion.model.thresholds.curves_from_detections`), the safe cells
       (:func:`fusion.model.thresholds.safe_cells`) and a refit on them. Mode ``safe-cells``; the
       network estimate should then flag small events
       (:func:`fusion.model.thresholds.flag_detection_bias`).
    4. Otherwise the warm start is handed on unchanged (mode ``unused``).

    Parameters
    ----------
    obs : ObservationSet
        The observations ``start`` was fitted on.
    start : RemlEmFit
        The detections-only REML-EM fit.
    anchor : Anchor
        Its anchor.
    gamma, unit_station
        As in :func:`fit_censored_stations`.
    refit : callable, optional
        ``refit(observations) -> RemlEmFit``: the REML-EM with the caller's settings, used by
        the safe-cell fallback on the subset of safe rows (same unit and event tables).
    soft_threshold_sd, min_detection_probability, max_iter, tol_bias, tol_log_sigma
        Passed to :func:`fit_censored_stations`.
    estimate_thresholds : bool, default=True
        Estimate missing thresholds (step 1).
    threshold_rounds : int, default=3
        Rounds of step 1.
    min_threshold_cells : int, default=10
        Detections and non-detections a station needs for a probit curve.
    safe_cells_fallback : bool, default=False
        Run step 3 when nothing else applies.
    safe_margin_sd : float, default=2.0
        Margin of the safe-cell rule, in units of σ̃_i.

    Returns
    -------
    NondetectionOutcome
    """
    if not (isinstance(threshold_rounds, int | np.integer) and threshold_rounds >= 1):
        raise ConfigError(
            "The 'threshold_rounds' parameter of refit_with_nondetections must be an int in "
            f"the range [1, inf). Got {threshold_rounds!r} instead."
        )
    opts: dict[str, Any] = {
        "anchor": anchor,
        "gamma": gamma,
        "unit_station": unit_station,
        "soft_threshold_sd": soft_threshold_sd,
        "min_detection_probability": min_detection_probability,
        "max_iter": max_iter,
        "tol_bias": tol_bias,
        "tol_log_sigma": tol_log_sigma,
    }
    n_known, n_clip = censoring_rows(obs)
    missing = ~obs.detected & ~np.isfinite(obs.threshold)
    if estimate_thresholds and np.any(missing):
        outcome = _estimated_thresholds(
            obs, start, opts, int(threshold_rounds), min_threshold_cells
        )
        if outcome is not None:
            return outcome
    if n_known + n_clip > 0:
        cf = fit_censored_stations(obs, start, **opts)
        return _joint_outcome(NondetectionMode.known_thresholds, start, cf, None, obs, 0, 0)
    if safe_cells_fallback and refit is not None:
        outcome = _safe_cells(obs, start, refit, min_threshold_cells, safe_margin_sd)
        if outcome is not None:
            return outcome
    return NondetectionOutcome.skipped(obs, start)


def _joint_outcome(
    mode: NondetectionMode,
    start: RemlEmFit,
    cf: CensoredStationFit,
    curves: DetectionCurves | None,
    observations: ObservationSet,
    n_imputed: int,
    rounds: int,
) -> NondetectionOutcome:
    """The outcome of a joint censored fit (known or estimated thresholds)."""
    return NondetectionOutcome(
        mode=mode,
        fit=cf.as_reml_fit(start),
        censored=cf,
        curves=curves,
        observations=observations,
        n_nondetections=int(np.count_nonzero(cf.row_kind == 2)),
        n_imputed=n_imputed,
        rounds=rounds,
    )


def _estimated_thresholds(
    obs: ObservationSet,
    start: RemlEmFit,
    opts: dict[str, Any],
    threshold_rounds: int,
    min_threshold_cells: int,
) -> NondetectionOutcome | None:
    """Step 1: rounds of detection curves, imputed thresholds and joint fit; None if no
    threshold could be imputed."""
    from fusion.model.thresholds import fit_detection_curves, impute_thresholds

    cf: CensoredStationFit | None = None
    curves: DetectionCurves | None = None
    cur_obs = obs
    n_imputed = 0
    rounds = 0
    cur_fit: RemlEmFit | CensoredStationFit = start
    for _ in range(threshold_rounds):
        predictor = loo_predictor(cur_obs, cur_fit)
        new_curves = fit_detection_curves(
            obs,
            predictor,
            min_detections=min_threshold_cells,
            min_nondetections=min_threshold_cells,
        )
        filled, imputed = impute_thresholds(obs, new_curves)
        if not np.any(imputed):
            break
        rounds += 1
        curves = new_curves
        cf = fit_censored_stations(filled, start, **opts)
        cur_obs, cur_fit = filled, cf
        n_imputed = int(imputed.sum())
    if cf is None:
        return None
    return _joint_outcome(
        NondetectionMode.estimated_thresholds, start, cf, curves, cur_obs, n_imputed, rounds
    )


def _safe_cells(
    obs: ObservationSet,
    start: RemlEmFit,
    refit: Callable[[ObservationSet], RemlEmFit],
    min_threshold_cells: int,
    safe_margin_sd: float,
) -> NondetectionOutcome | None:
    """Step 3: curves from the detections alone, the safe cells and a refit on them."""
    from fusion.model.thresholds import curves_from_detections, safe_cells

    curves = curves_from_detections(obs, min_detections=max(3 * min_threshold_cells, 3))
    if not np.any(curves.fitted):
        return None
    predictor = loo_predictor(obs, start)
    safe = safe_cells(obs, curves, predictor, start.sigma, margin_sd=safe_margin_sd)
    rows = np.flatnonzero(safe)
    if not rows.shape[0]:
        return None
    sub = refit(obs.subset(safe))
    return NondetectionOutcome(
        mode=NondetectionMode.safe_cells,
        fit=_expand_rows(sub, rows, obs.n_obs),
        censored=None,
        curves=curves,
        observations=obs,
        n_safe=int(rows.shape[0]),
    )
