"""The station model: biases, error variances, correlated pairs and epochs in one fit (issue 3).

:class:`StationModel` is the nightly learner. ``fit`` runs, on the observations of one magnitude
type:

1. the rolling window and exponential forgetting (docs/rolling-fit.md §1,
   :mod:`fusion.model.forgetting`);
2. the profiled REML-EM of docs/estimator.md §3 (:func:`fusion.model.reml_em.fit_reml_em`),
   warm-started from a previous model and anchored with continuity (:mod:`fusion.model.anchors`);
3. correlated-pair detection by the leave-two-out test (docs/pairs.md,
   :func:`fusion.model.pair_tests.detect_correlated_pairs`) and a refit with the flagged
   covariances;
4. leave-one-station-out z scores (docs/network-magnitude.md §7,
   :func:`fusion.network.event_gls.event_gls`), a CUSUM on
   each station's time-ordered z (docs/epochs.md, :func:`fusion.model.epochs.detect_bias_steps`), a
   split of stepped stations into epochs and a refit, for at most ``max_epoch_rounds`` rounds;
5. the global parametric-bootstrap test of independence (docs/pairs.md §8,
   :func:`fusion.model.pair_tests.global_independence_test`), whose refits use a fast Gaussian
   closure warm-started at the final parameters;
6. with ``use_nondetections``, the non-detections (docs/censoring.md §4,
   :func:`fusion.model.nondetection_modes.refit_with_nondetections`): the joint censored fit
   warm-started from step 4's fit when thresholds are stored (or estimated), else optionally
   the safe-cell fallback. The hand-over then carries the censored estimates.

The result is handed on as :attr:`StationModel.parameters_`
(:class:`fusion.model.parameters.StationParameters`); tables describe stations, pairs and epochs.

Parameters follow the scikit-learn contract (docs/conventions.md items 1–7): ``__init__`` only
assigns, ``fit`` validates and returns ``self``, learned attributes end in ``_`` and raise
:class:`~stations.errors.NotFittedError` before ``fit``; ``get_params``/``set_params`` come from
:class:`fusion.model.estimator_base.ParamsMixin`.
"""

from __future__ import annotations

import math
import warnings
from typing import Any, Self

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from fusion.model.anchors import (
    Anchor,
    AnchorKind,
    ReferenceEvents,
    read_reference_events,
)
from fusion.model.eb_priors import EBPrior
from fusion.model.epochs import STEP_COLUMNS, detect_bias_steps, split_epochs
from fusion.model.estimator_base import ParamsMixin
from fusion.model.forgetting import WarmStart, time_weights, unit_station_ids
from fusion.model.nondetection_modes import NondetectionOutcome, refit_with_nondetections
from fusion.model.pair_tests import (
    TABLE_COLUMNS,
    GlobalTestResult,
    detect_correlated_pairs,
    global_independence_test,
)
from fusion.model.parameters import StationParameters
from fusion.model.reml_em import RemlEmFit, fit_reml_em
from fusion.network.event_gls import event_gls
from fusion.network.gls_blocks import PairCovariance
from fusion.observations import ObservationSet
from fusion.settings import CensoringConfig, EpochConfig, LearnConfig, PairConfig
from stations.errors import ConfigError, ConvergenceWarning, InsufficientDataError

__all__ = ["STATION_TABLE_COLUMNS", "StationModel", "leave_one_out_z"]

#: Columns of :attr:`StationModel.station_table_`.
STATION_TABLE_COLUMNS = (
    "unit_id",
    "station_id",
    "epoch_start",
    "epoch_end",
    "bias",
    "bias_se",
    "sigma",
    "dof",
    "n_events",
    "weight_sum",
    "outlier_rate",
    "prior_dominated",
    "uncalibrated",
    "partner",
)

#: Epoch detection rounds (detect steps, split, refit) at most.
MAX_EPOCH_ROUNDS = 2
#: Adjacent epochs whose fitted biases differ by at most this many standard errors of the
#: difference are merged (docs/epochs.md; common practice, no source).
MERGE_Z = 2.0
#: An epoch shorter than this (days) whose neighbours' biases agree is a transient (a swarm or
#: an aftershock sequence seen by the station), not a change: both its steps are removed.
TRANSIENT_DAYS = 60.0
#: Most merge-and-refit rounds.
MERGE_ROUNDS = 3


def leave_one_out_z(obs: ObservationSet, fit: RemlEmFit) -> NDArray[np.float64]:
    """Leave-one-station-out z of every row under a fitted model (docs/network-magnitude.md §7).

    z_ij = (m_ij − b̂_i − M̂_j^(−i))/sqrt(s_i² + V_j^(−i)) with s_i² = σ̃_i² + Var(b̂_i); the
    reference M̂^(−i) uses the other stations with their robust weights (s²/ω), the numerator
    scale does not, so a station whose readings the fit down-weights still shows its full
    deviation. A flagged pair is left out as a block.

    Parameters
    ----------
    obs : ObservationSet
        The observations ``fit`` was made on.
    fit : RemlEmFit

    Returns
    -------
    ndarray, shape (nnz,)
        NaN for rows the fit did not use and where nothing is left without the row.
    """
    used = np.isfinite(fit.row_weight)
    rows = np.flatnonzero(used)
    ev, st = obs.event[rows], obs.station[rows]
    s2_plain = fit.sigma2[st] + fit.bias_var[st]
    s2_fit = fit.sigma2[st] / fit.row_weight[rows] + fit.bias_var[st]
    y = obs.magnitude[rows] - fit.bias[st]
    gls = event_gls(ev, st, y, s2_fit, obs.n_events, fit.pairs)
    z = np.full(obs.n_obs, np.nan)
    with np.errstate(invalid="ignore"):
        z[rows] = (y - gls.loo_magnitude) / np.sqrt(s2_plain + gls.loo_variance)
    return z


class StationModel(ParamsMixin):
    """Learn station biases, error variances, correlated pairs and epochs (docs/README.md).

    Parameters
    ----------
    half_life_days : float, default=120.0
        Half-life h of the event weights γ = 0.5**(age/h), days (``inf``: no forgetting).
    window_days : float, default=360.0
        Hard window, days.
    nu : float, default=4.0
        Student-t degrees of freedom of the robust weights.
    anchor : str, default="reference_set"
        Level anchor (docs/model.md §3, :mod:`fusion.model.anchors`): ``"reference_set"``,
        ``"median"``, ``"reference_events"`` or ``"mean_magnitude"``.
    reference_stations : tuple of str, default=()
        Reference set R (``NET.STA.LOC``); empty means every station.
    reference_events : ReferenceEvents, optional
        Events of known magnitude, required for ``anchor="reference_events"``.
    mean_magnitude : float, default=nan
        Known mean magnitude for ``anchor="mean_magnitude"`` (not recommended).
    detect_pairs : bool, default=True
        Run the correlated-pair search and refit with the flagged covariances.
    min_shared_events : int, default=30
        n_min of the pair test.
    fdr_q : float, default=0.05
        Benjamini–Hochberg level of the pair tests.
    max_pair_rounds : int, default=3
        Partner-exclusion rounds of the pair search.
    shrink_n0 : float, default=20.0
        Covariance shrinkage n/(n + n0).
    detect_epochs : bool, default=True
        Run the CUSUM on leave-one-out z and split stepped stations into epochs.
    cusum_k, cusum_h : float, default=0.5, 5.0
        CUSUM reference value and alarm level (z units).
    min_events_per_epoch : int, default=20
        Readings required on each side of a bias step.
    global_test_replicates : int, default=200
        Bootstrap replicates of the global independence test; 0 skips it.
    max_iter : int, default=100
    tol_bias : float, default=1e-4
    tol_log_sigma : float, default=1e-3
        Iteration limit and tolerances of the REML-EM (:func:`fusion.model.reml_em.fit_reml_em`).
    random_state : int, optional
        Seed of the global test's simulations.
    use_nondetections : bool, default=True
        Use non-detections (with stored or estimated thresholds) and clipped readings in the
        station fit (step 6 of the module docstring).
    soft_threshold_sd : float, default=0.0
        g of the soft detection threshold, magnitude units (0: hard).
    min_detection_probability : float, default=0.01
        Non-detections less likely than this to have been detections are left out.
    estimate_thresholds : bool, default=True
        Estimate missing thresholds from per-station detection curves.
    threshold_rounds : int, default=3
        Rounds of threshold estimation and joint fit.
    safe_cells_fallback : bool, default=False
        Without any threshold, fit on safe cells only (the fallback of docs/censoring.md §8).

    Attributes
    ----------
    parameters_ : StationParameters
        Per station unit: b̂, Var(b̂), σ̃², prior-dominated flag; the flagged pairs; τ_b², s0².
    station_table_ : pandas.DataFrame
        One row per unit, columns :data:`STATION_TABLE_COLUMNS` (magnitude units; ``partner``
        is the unit id of a flagged partner or "").
    pair_table_ : pandas.DataFrame
        The tested pairs (:class:`fusion.model.pair_tests.PairDetection` ``table``) of the last
        search; empty with its columns when the search is off or nothing was tested.
    epoch_table_ : pandas.DataFrame
        Accepted bias steps of all rounds (columns of :class:`fusion.model.epochs.BiasStepResult`
        ``table``; ``station`` is the code in the station-level table, ``unit_id`` the unit
        whose readings alarmed).
    global_test_ : GlobalTestResult or None
    fit_ : RemlEmFit
        The final REML-EM fit (on the unit table).
    n_iter_ : int
        Iterations of the final REML-EM fit.
    converged_ : bool
    anchor_ : AnchorResult
        Kind, value (store it for continuity) and the network calibration uncertainty.
    as_of_ : numpy.datetime64
        Reference time of the forgetting weights.
    nondetections_ : NondetectionOutcome
        How the non-detections were used (mode, joint fit, detection curves, counts).

    Notes
    -----
    ``fit`` never mutates its parameters. Units without data in the window keep the prior
    (b = μ0 ± τ_b, σ² = s0²) and are flagged uncalibrated.
    """

    def __init__(
        self,
        *,
        half_life_days: float = 120.0,
        window_days: float = 360.0,
        nu: float = 4.0,
        anchor: str = "reference_set",
        reference_stations: tuple[str, ...] = (),
        reference_events: ReferenceEvents | None = None,
        mean_magnitude: float = float("nan"),
        detect_pairs: bool = True,
        min_shared_events: int = 30,
        fdr_q: float = 0.05,
        max_pair_rounds: int = 3,
        shrink_n0: float = 20.0,
        detect_epochs: bool = True,
        cusum_k: float = 0.5,
        cusum_h: float = 5.0,
        min_events_per_epoch: int = 20,
        global_test_replicates: int = 200,
        max_iter: int = 100,
        tol_bias: float = 1e-4,
        tol_log_sigma: float = 1e-3,
        random_state: int | None = None,
        use_nondetections: bool = True,
        soft_threshold_sd: float = 0.0,
        min_detection_probability: float = 0.01,
        estimate_thresholds: bool = True,
        threshold_rounds: int = 3,
        safe_cells_fallback: bool = False,
    ) -> None:
        self.half_life_days = half_life_days
        self.window_days = window_days
        self.nu = nu
        self.anchor = anchor
        self.reference_stations = reference_stations
        self.reference_events = reference_events
        self.mean_magnitude = mean_magnitude
        self.detect_pairs = detect_pairs
        self.min_shared_events = min_shared_events
        self.fdr_q = fdr_q
        self.max_pair_rounds = max_pair_rounds
        self.shrink_n0 = shrink_n0
        self.detect_epochs = detect_epochs
        self.cusum_k = cusum_k
        self.cusum_h = cusum_h
        self.min_events_per_epoch = min_events_per_epoch
        self.global_test_replicates = global_test_replicates
        self.max_iter = max_iter
        self.tol_bias = tol_bias
        self.tol_log_sigma = tol_log_sigma
        self.random_state = random_state
        self.use_nondetections = use_nondetections
        self.soft_threshold_sd = soft_threshold_sd
        self.min_detection_probability = min_detection_probability
        self.estimate_thresholds = estimate_thresholds
        self.threshold_rounds = threshold_rounds
        self.safe_cells_fallback = safe_cells_fallback

    @classmethod
    def from_config(
        cls,
        learn: LearnConfig,
        pairs: PairConfig,
        epochs: EpochConfig,
        *,
        random_state: int | None = None,
        censoring: CensoringConfig | None = None,
    ) -> StationModel:
        """Build from the ``[learn]``, ``[pairs]`` and ``[epochs]`` configuration sections.

        ``censoring`` (the ``[censoring]`` section; default its defaults) sets the use of
        non-detections.

        ``learn.reference_events_csv`` (when not empty) is read with
        :func:`fusion.model.anchors.read_reference_events`; a relative path is taken from the
        current directory.
        """
        cens = censoring if censoring is not None else CensoringConfig()
        ref_events = (
            read_reference_events(learn.reference_events_csv)
            if learn.reference_events_csv
            else None
        )
        return cls(
            half_life_days=learn.half_life_days,
            window_days=learn.window_days,
            nu=learn.student_t_dof,
            anchor=learn.anchor,
            reference_stations=tuple(learn.reference_stations),
            reference_events=ref_events,
            mean_magnitude=learn.mean_magnitude,
            detect_pairs=True,
            min_shared_events=pairs.min_shared_events,
            fdr_q=pairs.fdr_q,
            max_pair_rounds=pairs.max_rounds,
            shrink_n0=pairs.shrink_n0,
            detect_epochs=epochs.enabled,
            cusum_k=epochs.cusum_k,
            cusum_h=epochs.cusum_h,
            min_events_per_epoch=epochs.min_events_per_epoch,
            global_test_replicates=pairs.global_test_replicates,
            max_iter=learn.max_iter,
            tol_bias=learn.tol_bias,
            tol_log_sigma=learn.tol_log_sigma,
            random_state=random_state,
            use_nondetections=cens.enabled,
            soft_threshold_sd=cens.soft_threshold_sd,
            min_detection_probability=cens.min_detection_probability,
            estimate_thresholds=cens.estimate_thresholds,
            threshold_rounds=cens.threshold_rounds,
            safe_cells_fallback=cens.safe_cells_fallback,
        )

    # -- validation (the constraint table of docs/conventions.md item 3) ---------------------------
    def _validate(self) -> None:
        name = type(self).__name__

        def fail(param: str, rule: str) -> ConfigError:
            return ConfigError(
                f"The {param!r} parameter of {name} must be {rule}. "
                f"Got {getattr(self, param)!r} instead."
            )

        def positive(param: str, *, allow_inf: bool = False) -> None:
            v = getattr(self, param)
            ok = isinstance(v, int | float) and not isinstance(v, bool) and v > 0
            if not ok or (not allow_inf and not math.isfinite(v)):
                raise fail(param, "a float in the range (0, inf" + ("]" if allow_inf else ")"))

        def integer(param: str, low: int) -> None:
            v = getattr(self, param)
            if not (isinstance(v, int | np.integer) and not isinstance(v, bool) and v >= low):
                raise fail(param, f"an int in the range [{low}, inf)")

        positive("half_life_days", allow_inf=True)
        positive("window_days", allow_inf=True)
        positive("nu")
        positive("cusum_h")
        positive("tol_bias")
        positive("tol_log_sigma")
        for param in ("cusum_k", "shrink_n0"):
            v = getattr(self, param)
            if not (isinstance(v, int | float) and not isinstance(v, bool) and 0 <= v < math.inf):
                raise fail(param, "a float in the range [0, inf)")
        if not (isinstance(self.fdr_q, int | float) and 0 < self.fdr_q < 1):
            raise fail("fdr_q", "a float in the range (0, 1)")
        integer("min_shared_events", 4)
        integer("max_pair_rounds", 1)
        integer("min_events_per_epoch", 1)
        integer("global_test_replicates", 0)
        integer("max_iter", 1)
        integer("threshold_rounds", 1)
        if not (
            isinstance(self.soft_threshold_sd, int | float)
            and not isinstance(self.soft_threshold_sd, bool)
            and 0 <= self.soft_threshold_sd < math.inf
        ):
            raise fail("soft_threshold_sd", "a float in the range [0, inf)")
        p_min = self.min_detection_probability
        if not (isinstance(p_min, int | float) and not isinstance(p_min, bool) and 0 <= p_min < 1):
            raise fail("min_detection_probability", "a float in the range [0, 1)")
        try:
            AnchorKind(self.anchor)
        except ValueError:
            raise fail("anchor", f"one of {[k.value for k in AnchorKind]}") from None
        if not isinstance(self.reference_stations, tuple | list):
            raise fail("reference_stations", "a tuple of station ids")
        if self.reference_events is not None and not isinstance(
            self.reference_events, ReferenceEvents
        ):
            raise fail("reference_events", "a ReferenceEvents (see read_reference_events)")
        for flag in (
            "detect_pairs",
            "detect_epochs",
            "use_nondetections",
            "estimate_thresholds",
            "safe_cells_fallback",
        ):
            if not isinstance(getattr(self, flag), bool | np.bool_):
                raise fail(flag, "a bool")

    # -- fit ---------------------------------------------------------------------------------
    def fit(
        self,
        obs: ObservationSet,
        *,
        as_of: np.datetime64 | str | None = None,
        previous: StationParameters | None = None,
    ) -> Self:
        """Learn the station model from ``obs`` (see module docstring for the sequence).

        Parameters
        ----------
        obs : ObservationSet
            Station magnitudes of one type, station-level (not yet split into epochs).
        as_of : datetime64 or ISO string, optional
            Reference time of the forgetting weights and end of the window; default the
            latest origin time.
        previous : StationParameters, optional
            The previous model: warm start (matched by unit id, else by station) and anchor
            continuity (docs/rolling-fit.md §4).

        Returns
        -------
        self

        Raises
        ------
        ConfigError
            A parameter is out of range, or the anchor lacks what it needs.
        InsufficientDataError
            No event in the window has two usable station magnitudes.
        """
        self._validate()
        if previous is not None and previous.magnitude_type != obs.magnitude_type:
            raise ConfigError(
                f"previous model is for {previous.magnitude_type}, the observations are "
                f"{obs.magnitude_type}; pass the previous model of the same magnitude type"
            )
        tw = time_weights(
            obs.event_time,
            as_of=as_of,
            half_life_days=float(self.half_life_days),
            window_days=float(self.window_days),
        )
        if not np.any(tw.in_window):
            raise InsufficientDataError(
                f"no {obs.magnitude_type} event in the {self.window_days}-day window before "
                f"{tw.as_of}; check as_of or widen window_days"
            )
        obs_w = obs.subset(tw.in_window[obs.event])
        anchor = Anchor(
            kind=AnchorKind(self.anchor),
            reference_stations=tuple(self.reference_stations),
            reference_events=self.reference_events,
            mean_magnitude=float(self.mean_magnitude),
            previous=previous,
        )
        gamma = tw.gamma

        # Station-level fit, pairs, refit.
        fit, detection_table, pairs = self._fit_with_pairs(
            obs_w, anchor, gamma, init=previous, unit_station=None
        )
        units = obs_w
        unit_station = unit_station_ids(obs_w.station_ids)
        unit_start: NDArray[np.datetime64] = np.full(
            obs_w.n_stations, np.datetime64("NaT", "us"), dtype="datetime64[us]"
        )
        unit_end: NDArray[np.datetime64] = unit_start.copy()
        steps_all = pd.DataFrame(columns=list(STEP_COLUMNS))

        # Epochs: CUSUM on leave-one-out z, split, refit.
        if self.detect_epochs:
            for _ in range(MAX_EPOCH_ROUNDS):
                z = leave_one_out_z(units, fit)
                steps = detect_bias_steps(
                    units,
                    z,
                    k=float(self.cusum_k),
                    h=float(self.cusum_h),
                    min_events=int(self.min_events_per_epoch),
                )
                new = _station_steps(steps.table, units, unit_station, obs_w.station_ids)
                new = _new_steps(new, steps_all)
                if new.empty:
                    break
                steps_all = pd.concat([steps_all, new], ignore_index=True)
                split = split_epochs(obs_w, steps_all[["station_id", "change_time"]])
                units = split.observations
                unit_station = np.asarray(split.unit_station)
                unit_start, unit_end = split.unit_start, split.unit_end
                warm = _warm_from_fit(fit, units, unit_station)
                fit, detection_table, pairs = self._fit_with_pairs(
                    units, anchor, gamma, init=warm, unit_station=unit_station
                )

        for _ in range(MERGE_ROUNDS):
            # Adjacent epochs whose biases agree within their uncertainty are one epoch; a
            # refit after a merge moves the other epochs' biases, so check again.
            if steps_all.empty:
                break
            sized = epoch_step_sizes(steps_all, unit_station, unit_start, fit)
            agree = (sized["step"].abs() <= MERGE_Z * sized["step_se"]).to_numpy(bool).copy()
            agree |= transient_steps(steps_all, sized, max_days=TRANSIENT_DAYS, z=MERGE_Z)
            if not agree.any():
                break
            steps_all = steps_all[~agree].reset_index(drop=True)
            split = split_epochs(obs_w, steps_all[["station_id", "change_time"]])
            units = split.observations
            unit_station = np.asarray(split.unit_station)
            unit_start, unit_end = split.unit_start, split.unit_end
            warm = _warm_from_fit(fit, units, unit_station)
            fit, detection_table, pairs = self._fit_with_pairs(
                units, anchor, gamma, init=warm, unit_station=unit_station
            )

        global_test = None
        if self.detect_pairs and self.global_test_replicates > 0:
            global_test = self._global_test(units, fit, anchor, gamma, unit_station)

        # Non-detections: joint censored fit (or the safe-cell fallback), docs/censoring.md §4.
        nondet = NondetectionOutcome.skipped(units, fit)
        if self.use_nondetections:
            nondet = self._nondetections(units, fit, anchor, gamma, unit_station)
            fit = nondet.fit

        self.fit_ = fit
        self.nondetections_ = nondet
        self.parameters_ = StationParameters(
            magnitude_type=obs.magnitude_type,
            unit_ids=np.asarray(units.station_ids, dtype=object),
            station_ids=np.asarray(unit_station, dtype=object),
            epoch_start=unit_start,
            epoch_end=unit_end,
            bias=fit.bias,
            bias_var=fit.bias_var,
            sigma2=fit.sigma2,
            prior_dominated=fit.prior_dominated,
            pairs=pairs if pairs is not None else PairCovariance.empty(units.n_stations),
            tau_b2=float(fit.prior.tau_b2),
            s0_2=float(fit.prior.s0_2),
        )
        self.station_table_ = _station_table(self.parameters_, fit)
        self.pair_table_ = (
            detection_table
            if detection_table is not None
            else pd.DataFrame(columns=list(TABLE_COLUMNS))
        )
        self.epoch_table_ = _with_step_sizes(
            steps_all.reset_index(drop=True), unit_station, unit_start, fit
        )
        self.global_test_ = global_test
        self.n_iter_ = fit.n_iter
        self.converged_ = fit.converged
        self.anchor_ = fit.anchor
        self.as_of_ = tw.as_of
        return self

    # -- steps of fit ------------------------------------------------------------------------
    def _reml(
        self,
        obs: ObservationSet,
        anchor: Anchor,
        gamma: NDArray[np.float64],
        *,
        init: WarmStart | StationParameters | None,
        pairs: PairCovariance | None,
        unit_station: NDArray[Any] | None,
        prior: EBPrior | None = None,
    ) -> RemlEmFit:
        return fit_reml_em(
            obs,
            anchor=anchor,
            gamma=gamma,
            pairs=pairs,
            init=init,
            nu=float(self.nu),
            max_iter=int(self.max_iter),
            tol_bias=float(self.tol_bias),
            tol_log_sigma=float(self.tol_log_sigma),
            prior=prior,
            shrink_n0=float(self.shrink_n0),
            unit_station=unit_station,
        )

    def _fit_with_pairs(
        self,
        obs: ObservationSet,
        anchor: Anchor,
        gamma: NDArray[np.float64],
        *,
        init: WarmStart | StationParameters | None,
        unit_station: NDArray[Any] | None,
    ) -> tuple[RemlEmFit, pd.DataFrame | None, PairCovariance | None]:
        fit = self._reml(obs, anchor, gamma, init=init, pairs=None, unit_station=unit_station)
        if not self.detect_pairs:
            return fit, None, None
        omega = np.where(np.isfinite(fit.row_weight), fit.row_weight, 1.0)
        detection = detect_correlated_pairs(
            obs,
            fit.bias,
            fit.sigma2,
            gamma=gamma,
            omega=omega,
            min_shared=int(self.min_shared_events),
            fdr_q=float(self.fdr_q),
            max_rounds=int(self.max_pair_rounds),
            shrink_n0=float(self.shrink_n0),
        )
        if detection.covariance.n_pairs == 0:
            return fit, detection.table, None
        warm = WarmStart(bias=fit.bias, sigma2=fit.sigma2, prior=fit.prior)
        fit = self._reml(
            obs,
            anchor,
            gamma,
            init=warm,
            pairs=detection.covariance,
            unit_station=unit_station,
            prior=fit.prior,
        )
        return fit, detection.table, fit.pairs

    def _nondetections(
        self,
        obs: ObservationSet,
        fit: RemlEmFit,
        anchor: Anchor,
        gamma: NDArray[np.float64],
        unit_station: NDArray[Any],
    ) -> NondetectionOutcome:
        warm = WarmStart(bias=fit.bias, sigma2=fit.sigma2, prior=fit.prior)

        def refit(sub: ObservationSet) -> RemlEmFit:
            return self._reml(
                sub,
                anchor,
                gamma,
                init=warm,
                pairs=fit.pairs,
                unit_station=unit_station,
                prior=fit.prior,
            )

        return refit_with_nondetections(
            obs,
            fit,
            anchor=anchor,
            gamma=gamma,
            unit_station=unit_station,
            refit=refit,
            soft_threshold_sd=float(self.soft_threshold_sd),
            min_detection_probability=float(self.min_detection_probability),
            estimate_thresholds=bool(self.estimate_thresholds),
            threshold_rounds=int(self.threshold_rounds),
            safe_cells_fallback=bool(self.safe_cells_fallback),
            tol_bias=float(self.tol_bias),
            tol_log_sigma=float(self.tol_log_sigma),
        )

    def _global_test(
        self,
        obs: ObservationSet,
        fit: RemlEmFit,
        anchor: Anchor,
        gamma: NDArray[np.float64],
        unit_station: NDArray[Any],
    ) -> GlobalTestResult | None:
        pairs = fit.pairs if fit.pairs is not None else PairCovariance.empty(obs.n_stations)
        warm = WarmStart(bias=fit.bias, sigma2=fit.sigma2, prior=fit.prior)
        simple = Anchor(kind=AnchorKind.REFERENCE_SET)

        def refit(obs_star: ObservationSet) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
            # Gaussian replicates: no robust weights, fixed priors, warm start, looser tolerance.
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ConvergenceWarning)
                star = fit_reml_em(
                    obs_star,
                    anchor=simple,
                    gamma=gamma,
                    pairs=pairs if pairs.n_pairs else None,
                    init=warm,
                    prior=fit.prior,
                    eb_every=0,
                    robust=False,
                    max_iter=50,
                    tol_bias=1e-3,
                    tol_log_sigma=1e-2,
                    shrink_n0=float(self.shrink_n0),
                    unit_station=unit_station,
                    dense_cov_max=0,
                )
            return star.bias, star.sigma2

        omega = np.where(np.isfinite(fit.row_weight), fit.row_weight, 1.0)
        return global_independence_test(
            obs,
            refit,
            fit.bias,
            fit.sigma2,
            fit.event_magnitude,
            pairs,
            replicates=int(self.global_test_replicates),
            random_state=self.random_state,
            min_shared=int(self.min_shared_events),
            omega=omega,
        )


# -- helpers -----------------------------------------------------------------------------------


def _station_steps(
    table: pd.DataFrame,
    units: ObservationSet,
    unit_station: NDArray[Any],
    station_ids: NDArray[Any],
) -> pd.DataFrame:
    """Steps found on a unit table, re-labelled by station.

    ``unit_id`` is the unit whose readings alarmed; ``station_id`` and ``station`` (the code in
    the station-level table ``station_ids``) name its station.
    """
    if table.empty:
        return table
    out = table.copy()
    code = out["station"].to_numpy(dtype=np.int64)
    out["unit_id"] = np.asarray(units.station_ids)[code].astype(str)
    sid = np.asarray(unit_station)[code].astype(str)
    out["station_id"] = sid
    lookup = {s: i for i, s in enumerate(np.asarray(station_ids).astype(str).tolist())}
    out["station"] = np.array([lookup[s] for s in sid.tolist()], dtype=np.int64)
    return out


def _new_steps(found: pd.DataFrame, known: pd.DataFrame) -> pd.DataFrame:
    """Steps of ``found`` whose (station, change time) is not yet in ``known``."""
    if found.empty:
        return found
    if known.empty:
        return found
    key_known = set(
        zip(known["station_id"].astype(str), pd.to_datetime(known["change_time"]), strict=True)
    )
    keep = [
        (s, t) not in key_known
        for s, t in zip(
            found["station_id"].astype(str), pd.to_datetime(found["change_time"]), strict=True
        )
    ]
    return found[np.asarray(keep, dtype=bool)]


def _warm_from_fit(fit: RemlEmFit, units: ObservationSet, unit_station: NDArray[Any]) -> WarmStart:
    """Each new unit starts from its station's previous estimate (matched by station id)."""
    prev_ids = np.asarray(unit_station_ids(fit.station_ids)).astype(str)
    prev_units = np.asarray(fit.station_ids).astype(str)
    new_units = np.asarray(units.station_ids).astype(str)
    new_st = np.asarray(unit_station).astype(str)
    by_unit = {u: i for i, u in enumerate(prev_units.tolist())}
    by_station: dict[str, int] = {}
    for i, s in enumerate(prev_ids.tolist()):
        by_station.setdefault(s, i)
    idx = np.array(
        [by_unit.get(u, by_station.get(s, -1)) for u, s in zip(new_units, new_st, strict=True)],
        dtype=np.int64,
    )
    ok = idx >= 0
    bias = np.full(new_units.shape[0], np.nan)
    sigma2 = np.full(new_units.shape[0], np.nan)
    bias[ok] = fit.bias[idx[ok]]
    sigma2[ok] = fit.sigma2[idx[ok]]
    return WarmStart(bias=bias, sigma2=sigma2, prior=fit.prior)


def _station_table(params: StationParameters, fit: RemlEmFit) -> pd.DataFrame:
    partner = np.full(params.n_units, "", dtype=object)
    pairs = params.pairs
    if pairs.n_pairs:
        partner[pairs.k] = params.unit_ids[pairs.l]
        partner[pairs.l] = params.unit_ids[pairs.k]
    return pd.DataFrame(
        {
            "unit_id": params.unit_ids.astype(str),
            "station_id": params.station_ids.astype(str),
            "epoch_start": params.epoch_start,
            "epoch_end": params.epoch_end,
            "bias": params.bias,
            "bias_se": np.sqrt(params.bias_var),
            "sigma": np.sqrt(params.sigma2),
            "dof": fit.dof,
            "n_events": fit.n_events,
            "weight_sum": fit.weight_sum,
            "outlier_rate": fit.outlier_rate,
            "prior_dominated": params.prior_dominated,
            "uncalibrated": fit.uncalibrated,
            "partner": partner,
        },
        columns=list(STATION_TABLE_COLUMNS),
    )


def epoch_step_sizes(
    steps: pd.DataFrame,
    unit_station: NDArray[Any],
    unit_start: NDArray[np.datetime64],
    fit: RemlEmFit,
) -> pd.DataFrame:
    """Fitted size of each step: the biases of the epochs on either side of it.

    Returns
    -------
    pandas.DataFrame
        Aligned with ``steps``: ``bias_before``, ``bias_after`` (magnitude units), ``step``
        (after − before) and ``step_se`` (sqrt(Var b̂_before + Var b̂_after), independent
        epochs). NaN where an epoch is not found.
    """
    units = pd.DataFrame(
        {
            "station_id": np.asarray(unit_station).astype(str),
            "start": pd.to_datetime(np.asarray(unit_start)),
            "bias": fit.bias,
            "var": fit.bias_var,
        }
    )
    units = units.sort_values(["station_id", "start"], na_position="first", kind="stable")
    prev = units.groupby("station_id")[["bias", "var"]].shift(1)
    units = units.assign(bias_prev=prev["bias"], var_prev=prev["var"]).dropna(subset=["start"])
    key = pd.DataFrame(
        {
            "station_id": steps["station_id"].astype(str).to_numpy(),
            "start": pd.to_datetime(steps["change_time"]).to_numpy(),
        }
    )
    m = key.merge(units, on=["station_id", "start"], how="left")
    step = (m["bias"] - m["bias_prev"]).to_numpy(float)
    return pd.DataFrame(
        {
            "bias_before": m["bias_prev"].to_numpy(float),
            "bias_after": m["bias"].to_numpy(float),
            "step": step,
            "step_se": np.sqrt(m["var"].to_numpy(float) + m["var_prev"].to_numpy(float)),
        },
        index=steps.index,
    )


def _with_step_sizes(
    steps: pd.DataFrame,
    unit_station: NDArray[Any],
    unit_start: NDArray[np.datetime64],
    fit: RemlEmFit,
) -> pd.DataFrame:
    """The step table with the fitted sizes; ``direction`` follows the fitted step."""
    if steps.empty:
        return steps
    sized = epoch_step_sizes(steps, unit_station, unit_start, fit)
    out = pd.concat([steps.drop(columns=list(sized.columns), errors="ignore"), sized], axis=1)
    fitted = np.sign(sized["step"].to_numpy(float))
    out["direction"] = np.where(np.isfinite(fitted) & (fitted != 0), fitted, out["direction"])
    out["direction"] = out["direction"].astype(np.int64)
    return out


def transient_steps(
    steps: pd.DataFrame, sized: pd.DataFrame, *, max_days: float, z: float
) -> NDArray[np.bool_]:
    """Steps that bound a short epoch between two epochs whose biases agree.

    Consecutive steps k, k + 1 of one station less than ``max_days`` apart, with
    |b̂ before k − b̂ after k + 1| ≤ z · sqrt(se_k² + se_{k+1}²) (a conservative SE: the middle
    epoch's variance counts twice), are both marked (docs/epochs.md); the shortest such epochs
    are taken first and a step is part of at most one.

    Parameters
    ----------
    steps : pandas.DataFrame
        ``station_id`` and ``change_time`` per step.
    sized : pandas.DataFrame
        :func:`epoch_step_sizes` of ``steps`` (same index).
    """
    n = len(steps)
    out = np.zeros(n, dtype=bool)
    if n < 2:
        return out
    t = pd.to_datetime(steps["change_time"]).to_numpy(dtype="datetime64[us]")
    sid = steps["station_id"].astype(str).to_numpy()
    order = np.lexsort((t, sid))
    t, sid = t[order], sid[order]
    before = sized["bias_before"].to_numpy(float)[order]
    after = sized["bias_after"].to_numpy(float)[order]
    se = sized["step_se"].to_numpy(float)[order]
    same = sid[1:] == sid[:-1]
    short = (t[1:] - t[:-1]) < np.timedelta64(int(max_days * 86400e6), "us")
    back = np.abs(before[:-1] - after[1:]) <= z * np.sqrt(se[:-1] ** 2 + se[1:] ** 2)
    hit = np.flatnonzero(same & short & back)
    # Shortest transients first; a step belongs to at most one transient, so the real step
    # before a swarm is not paired with the swarm's first step.
    gap = (t[1:] - t[:-1])[hit]
    mark = np.zeros(n, dtype=bool)
    for i in hit[np.argsort(gap, kind="stable")].tolist():  # a few candidate pairs
        if not (mark[i] or mark[i + 1]):
            mark[i] = mark[i + 1] = True
    out[order] = mark
    return out
