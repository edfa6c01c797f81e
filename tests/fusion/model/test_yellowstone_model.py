"""The station model on real open data: UUSS Yellowstone station ML, 1998-2020.

Data: ``station_ml_geobalanced.csv`` of Holt, Pechmann & Koper (2022), BSSA 112(2):905-920,
doi:10.1785/0120210240 (MIT licence; ``tests/data/yellowstone-uuss/README.md``), read from
``tests/data`` and ingested with the ``yellowstone`` reader, which stores SML − Corr, the station ML
before the network's station correction. Nothing here knows a true event magnitude; the checks
are the label-free ones of docs/validation.md and two outside comparisons:

- split halves (odd and even events): corr(b̂_odd, b̂_even) against τ_b²/(τ_b² + Var b̂)
  [derived, docs/validation.md §3], bounded below through Fisher's z (Fisher 1915; SE of atanh r is
  1/sqrt(n − 3), from memory);
- held-out station prediction (docs/validation.md §2) on a rolling origin: on 1 January of each year
  the model is fitted on the data before it with the shipped configuration (120-day half-life,
  360-day window, warm start from the previous year's model, as the nightly run does) and
  predicts every reading of that year from the other stations; GLS against the plain mean,
  each after removing its own mean error (the plain mean sits on another level than the
  anchored target m − b̂, and a level is not skill: docs/model.md §3);
- the network's published event ML (``EqML``): per-station medians of m − EqML are the
  classical labelled station terms; the learned biases should follow them;
- the network's own station corrections (``Corr``; b ≈ −Corr if they described these
  magnitudes): printed, bounded only against a sign-convention error, because they include the
  network's own distance-curve choices and changed over 22 years.

Run with ``-s`` to see the printed numbers.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

from fusion.model.parameters import StationParameters
from fusion.model.station_model import StationModel, leave_one_out_z
from fusion.model.validation import held_out_prediction, split_half_agreement
from fusion.observations import ObservationSet
from fusion.settings import MagfuseConfig, load_config
from stations.errors import InsufficientDataError
from stations.ingest import ingest_file
from stations.store import StationMagnitudeStore
from tests.datasets import YELLOWSTONE

DATA = YELLOWSTONE
TABLE = DATA / "station_ml_geobalanced.csv"

#: Stations compared one by one: at least this many readings over the 22 years.
MIN_EVENTS = 100
INF = float("inf")


@dataclass(frozen=True)
class Uuss:
    obs: ObservationSet
    raw: pd.DataFrame  # the published table as read by pandas (outside values Corr, EqML)
    cfg: MagfuseConfig
    counts: pd.Series  # readings per station


@pytest.fixture(scope="module")
def uuss(tmp_path_factory: pytest.TempPathFactory) -> Uuss:
    store = StationMagnitudeStore.open(tmp_path_factory.mktemp("uuss") / "store")
    ingest_file(store, TABLE, format="yellowstone")
    obs = ObservationSet.from_frame(store.scan(magnitude_type="ML"), magnitude_type="ML")
    raw = pd.read_csv(TABLE, dtype={"Evid": str})
    raw = raw[raw["Corr"].notna()].assign(station_id=raw["Net"] + "." + raw["Sta"] + ".")
    counts = pd.Series(obs.station_counts(), index=obs.station_ids.astype(str))
    return Uuss(obs, raw, load_config(), counts)


def _whole_period_model(cfg: MagfuseConfig) -> StationModel:
    """The shipped configuration over all data: no window, no forgetting, one bias per station
    (epochs off, so each station has one bias to compare), no global-test bootstrap (it does not
    change the parameters)."""
    m = StationModel.from_config(cfg.learn, cfg.pairs, cfg.epochs, random_state=0)
    return m.set_params(
        half_life_days=INF, window_days=INF, detect_epochs=False, global_test_replicates=0
    )


def _fit(model: StationModel, obs: ObservationSet, **kw: object) -> StationModel:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence and degeneracy warnings are checked elsewhere
        return model.fit(obs, **kw)  # type: ignore[arg-type]


# -- (a) split halves ----------------------------------------------------------------------------


def test_split_half_biases_agree_as_expected(uuss: Uuss) -> None:
    obs = uuss.obs
    odd = (np.arange(obs.n_events) % 2 == 1)[obs.event]  # events in origin-time order
    fits = [_fit(_whole_period_model(uuss.cfg), obs.subset(half)) for half in (odd, ~odd)]
    tables = [f.station_table_.set_index("station_id") for f in fits]
    ids = uuss.counts.index[uuss.counts >= MIN_EVENTS]
    a, b = (t.loc[ids] for t in tables)
    # the fits' own prior (docs/estimator.md §5.2)
    tau_b2 = float(np.mean([f.parameters_.tau_b2 for f in fits]))
    res = split_half_agreement(
        a["bias"], b["bias"], a["bias_se"] ** 2, b["bias_se"] ** 2, tau_b2=tau_b2
    )
    # Fisher's z: atanh(r) is near-normal with SD 1/sqrt(n - 3); three SDs below the expected.
    floor = float(np.tanh(np.arctanh(res.expected_correlation) - 3 / np.sqrt(res.n_stations - 3)))
    msg = (
        f"split halves, {res.n_stations} stations with >= {MIN_EVENTS} readings: "
        f"corr {res.correlation:.3f}, expected {res.expected_correlation:.3f} "
        f"(tau_b^2 {res.tau_b2:.4f}), lower bound {floor:.3f}"
    )
    print("\n" + msg)
    assert res.n_stations >= 10, msg
    assert res.correlation >= floor, msg


# -- (b) held-out prediction on a rolling origin -----------------------------------------------

_METHODS = ("gls", "bias_corrected_mean", "plain_mean", "median")


@dataclass(frozen=True)
class RollingScore:
    """Pooled held-out errors of the four methods of :func:`held_out_prediction`.

    ``mse`` is the plain mean square; ``mean_error`` its level part; ``level_free`` the mean
    square after removing each method's mean error (one common offset per method, as the demo
    scores against truth: a network magnitude's level is arbitrary until anchored,
    docs/model.md §3). Magnitude units and their squares.
    """

    mse: dict[str, float]
    mean_error: dict[str, float]
    level_free: dict[str, float]
    plain_minus_gls_ci: tuple[float, float]  # level-free, paired bootstrap over events, 95 %
    gls_errors: pd.Series  # per (event_id, station_id), for paired comparisons
    n_events: int
    n_fits: int

    def summary(self) -> str:
        lo, hi = self.plain_minus_gls_ci
        lf, mse, me = self.level_free, self.mse, self.mean_error
        return (
            f"{self.n_events} events, {self.n_fits} yearly fits; level-free held-out MSE: "
            f"fused (GLS) {lf['gls']:.5f}, plain mean {lf['plain_mean']:.5f}, bias-corrected "
            f"mean {lf['bias_corrected_mean']:.5f}, median {lf['median']:.5f}; plain - GLS "
            f"95 % CI [{lo:+.5f}, {hi:+.5f}]. Raw MSE GLS {mse['gls']:.5f}, plain mean "
            f"{mse['plain_mean']:.5f} (mean errors {me['gls']:+.3f}, {me['plain_mean']:+.3f})"
        )


def _evaluation_set(
    obs: ObservationSet, params: StationParameters, rows: np.ndarray
) -> ObservationSet:
    """Readings ``rows`` of ``obs`` coded by the model's units (its epochs), stations it knows."""
    sid = obs.station_ids[obs.station[rows]].astype(str)
    t = obs.event_time[obs.event[rows]]
    unit = params.assign_units(sid, t)
    keep = unit >= 0
    return ObservationSet.from_rows(
        magnitude_type=obs.magnitude_type,
        event_id=obs.event_ids[obs.event[rows]][keep],
        station_id=params.unit_ids[unit[keep]].astype(str),
        magnitude=obs.magnitude[rows][keep],
        origin_time=t[keep],
        station_ids=params.unit_ids.astype(str),
    )


def _rolling_held_out(uuss: Uuss, *, detect_epochs: bool) -> RollingScore:
    """Fit on 1 January of each year 1999-2020 with the shipped [learn]/[pairs]/[epochs]
    settings and warm start, predict that year's readings (docs/validation.md §2 protocol per
    year)."""
    obs, cfg = uuss.obs, uuss.cfg
    t_row = obs.event_time[obs.event]
    rows_all, previous, fits = [], None, 0
    for year in range(1999, 2021):  # a short loop over yearly fits, not over rows
        t1 = np.datetime64(f"{year}-01-01", "us")
        t2 = np.datetime64(f"{year + 1}-01-01", "us")
        model = StationModel.from_config(cfg.learn, cfg.pairs, cfg.epochs, random_state=0)
        model.set_params(global_test_replicates=0, detect_epochs=detect_epochs)
        train = obs.subset(t_row < t1)
        try:
            _fit(model, train, as_of=t1 - np.timedelta64(1, "us"), previous=previous)
        except InsufficientDataError:
            continue
        previous, fits = model.parameters_, fits + 1
        evaluate = _evaluation_set(obs, previous, np.flatnonzero((t_row >= t1) & (t_row < t2)))
        p = previous
        res = held_out_prediction(
            p.bias, p.sigma2, p.pairs, evaluate, bias_var=p.bias_var, replicates=0
        )
        unit_station = dict(zip(p.unit_ids.astype(str), p.station_ids.astype(str), strict=True))
        rows_all.append(res.rows.assign(station_id=res.rows["station_id"].map(unit_station)))
    rows = pd.concat(rows_all, ignore_index=True)
    _, ev = np.unique(rows["event_id"].to_numpy(), return_inverse=True)
    n_ev = int(ev.max()) + 1
    count = np.bincount(ev, minlength=n_ev).astype(float)
    s1 = {m: np.bincount(ev, weights=rows[f"error_{m}"], minlength=n_ev) for m in _METHODS}
    s2 = {m: np.bincount(ev, weights=rows[f"error_{m}"] ** 2, minlength=n_ev) for m in _METHODS}
    n = count.sum()
    mse = {m: float(s2[m].sum() / n) for m in _METHODS}
    mean = {m: float(s1[m].sum() / n) for m in _METHODS}
    level_free = {m: mse[m] - mean[m] ** 2 for m in _METHODS}
    # Paired bootstrap over events (Efron & Tibshirani 1993, ch. 6 [from memory]): every method
    # scored on the same resampled events, its level removed on that resample.
    pick = np.random.default_rng(20260601).integers(0, n_ev, size=(1000, n_ev))
    n_b = count[pick].sum(1)

    def resampled(m: str) -> np.ndarray:
        return s2[m][pick].sum(1) / n_b - (s1[m][pick].sum(1) / n_b) ** 2

    lo, hi = np.percentile(resampled("plain_mean") - resampled("gls"), [2.5, 97.5])
    errors = rows.set_index(["event_id", "station_id"])["error_gls"]
    return RollingScore(mse, mean, level_free, (float(lo), float(hi)), errors, n_ev, fits)


@pytest.fixture(scope="module")
def rolling(uuss: Uuss) -> dict[bool, RollingScore]:
    """Held-out scores with the shipped configuration (epochs on) and with epochs off."""
    return {ep: _rolling_held_out(uuss, detect_epochs=ep) for ep in (True, False)}


_EPOCH_XFAIL = pytest.mark.xfail(
    strict=True,
    raises=AssertionError,  # only the final claim may fail; set-up failures stay failures
    reason="CUSUM bias steps (docs/epochs.md) assume independent leave-one-out z; on Yellowstone a "
    "station's z are serially correlated (swarms share paths). Scaling by the lag-1 "
    "autocorrelation (fusion.model.epochs.lag1_scale) halved the splits over 22 years "
    "(55 to 28), the "
    "shipped model now predicts better than the plain mean, but epoch splits still cost a little "
    "held-out accuracy on this network (level-free MSE +0.001)",
)


@pytest.mark.parametrize(
    "epochs",
    [
        pytest.param(True, id="shipped"),
        pytest.param(False, id="epochs-off"),
    ],
)
def test_fused_estimate_predicts_held_out_readings_better_than_the_plain_mean(
    rolling: dict[bool, RollingScore], epochs: bool
) -> None:
    r = rolling[epochs]
    msg = f"[epochs {'on' if epochs else 'off'}] " + r.summary()
    print("\n" + msg)
    if r.n_fits < 20:  # a broken set-up, not the finding the xfail expects
        pytest.fail(msg)
    assert r.level_free["gls"] < r.level_free["plain_mean"], msg


@_EPOCH_XFAIL
def test_epoch_splits_do_not_worsen_held_out_prediction(
    uuss: Uuss, rolling: dict[bool, RollingScore]
) -> None:
    both = pd.concat(
        [rolling[True].gls_errors, rolling[False].gls_errors], axis=1, keys=["on", "off"]
    )
    if both.isna().any().any():  # the same readings must be scored
        pytest.fail("the two rolling evaluations scored different readings")
    ev = pd.factorize(both.index.get_level_values(0))[0]
    n_ev = int(ev.max()) + 1
    count = np.bincount(ev, minlength=n_ev)
    pick = np.random.default_rng(20260602).integers(0, n_ev, size=(1000, n_ev))
    n_b = count[pick].sum(1)
    lf = {}
    for k in both:
        s1 = np.bincount(ev, weights=both[k], minlength=n_ev)[pick].sum(1) / n_b
        s2 = np.bincount(ev, weights=both[k] ** 2, minlength=n_ev)[pick].sum(1) / n_b
        lf[k] = s2 - s1**2
    lo, hi = np.percentile(lf["on"] - lf["off"], [2.5, 97.5])
    # The cause: lag-1 autocorrelation of each station's leave-one-out z in time order, on an
    # unsplit fit of all data (about 0 for independent z).
    fit = _fit(_whole_period_model(uuss.cfg), uuss.obs)
    z = leave_one_out_z(uuss.obs, fit.fit_)
    zt = pd.DataFrame({"station": uuss.obs.station, "z": z}).dropna()  # rows are in time order
    lag1 = zt.groupby("station")["z"].apply(lambda s: s.autocorr(1)).dropna()
    on, off = rolling[True].level_free["gls"], rolling[False].level_free["gls"]
    msg = (
        f"level-free held-out GLS MSE with epochs {on:.5f}, without {off:.5f}; on - off 95 % "
        f"CI [{lo:+.5f}, {hi:+.5f}]; median lag-1 autocorrelation of a station's leave-one-out "
        f"z {lag1.median():.2f} over {len(lag1)} stations"
    )
    print("\n" + msg)
    assert on <= off, msg


# -- (c) outside references: the published event ML and the network's corrections ---------------


def test_learned_biases_follow_the_published_event_ml_not_the_correction_table(
    uuss: Uuss,
) -> None:
    fit = _fit(_whole_period_model(uuss.cfg), uuss.obs)
    table = fit.station_table_.set_index("station_id")
    ids = uuss.counts.index[uuss.counts >= MIN_EVENTS]
    bias = table.loc[ids, "bias"].to_numpy()
    raw = uuss.raw
    # Labelled station terms: median of (SML - Corr) - EqML per station, EqML the network's
    # published event ML (the classical way to derive station corrections from a catalogue).
    labelled = ((raw["SML"] - raw["Corr"]) - raw["EqML"]).groupby(raw["station_id"]).median()
    # The network's corrections, averaged over the readings (some changed over the years).
    minus_corr = -raw.groupby("station_id")["Corr"].mean()
    r_label = float(np.corrcoef(bias, labelled.loc[ids])[0, 1])
    r_corr = float(np.corrcoef(bias, minus_corr.loc[ids])[0, 1])
    r_label_corr = float(np.corrcoef(labelled.loc[ids], minus_corr.loc[ids])[0, 1])
    msg = (
        f"{len(ids)} stations: corr(learned b, median(m - EqML)) {r_label:.3f}; "
        f"corr(learned b, -Corr) {r_corr:.3f}; corr(median(m - EqML), -Corr) {r_label_corr:.3f}"
    )
    print("\n" + msg)
    # Measured 0.96; 0.85 leaves room for refits of the model without hiding a real break.
    assert r_label >= 0.85, msg
    # Loose on purpose (module docstring). A sign-convention error would show here: learning
    # SML itself gives -0.77, SML + Corr gives -0.92 (measured with this fit).
    assert r_corr > -0.5, msg
