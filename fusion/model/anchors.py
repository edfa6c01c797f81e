"""Anchors: what fixes the level of station biases and event magnitudes.

See docs/model.md §3 (anchors) and docs/rolling-fit.md §4 (continuity across refits).

In each connected component the data cannot tell M_j + δ, b_i − δ from M_j, b_i; one anchor per
component fixes δ. The anchor shifts every b̂ and M̂ of the component by one constant; weights,
relative magnitudes and precisions do not change. Its uncertainty is reported separately as the
*network calibration uncertainty*.

====  =====================  ===============================================================
id    kind                   rule
====  =====================  ===============================================================
A1    ``reference_set``      Σ_{i∈R} ϖ_i b_i = B_R (ϖ normalised to sum 1); B_R = ``value``
                             (0) at first calibration, then the previous model's value over
                             the reference units present in both fits (continuity)
A2    ``median``             median_{i∈R} b_i = B_R, by re-centring after each b-step
A3    ``reference_events``   M_j = M*_j for events of known magnitude (hard), or the prior
                             M_j ~ N(M*_j, s*_j²) when an uncertainty s*_j > 0 is given
A4    ``mean_magnitude``     the γ-weighted mean of M̂_j over the fitted events of a
                             component equals a known value. **Not recommended**: the
                             population changes with seismicity and detection, and each
                             station's mean covers a different subset of events (docs/model.md §3)
====  =====================  ===============================================================

Components holding no anchor (no reference station, no reference event) are pinned by a
fallback, mean bias = μ0 over the component, and their stations are reported uncalibrated
(:mod:`fusion.model.connectivity`). μ0, the level the bias prior pulls toward, is the anchor level
B_R for A1 and A2 and 0 for A3 and A4, so the prior never fights the anchor.

A reference *station* that was split into epochs (docs/epochs.md) shares its weight ϖ among its
units in proportion to their Σγ, so a station with an instrument change is not counted twice.

Calibration uncertainty (the SD of the common level) [derived]:

- A1: τ_b·sqrt(Σ ϖ_i²), the spread of the mean true bias of the reference set when station
  biases scatter with SD τ_b about the scale's nominal level;
- A2: τ_b·sqrt(π/(2|R|)), the asymptotic SD of a normal sample median [from memory];
- A3: 1/sqrt(Σ_j 1/(V_j + s*_j²)) over the reference events, V_j the GLS variance of the
  event from its stations;
- A4: sqrt(Σ γ_j² V_j)/Σ γ_j, the estimation error of the window mean.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from fusion.model.parameters import StationParameters
from fusion.observations import index_of
from stations.errors import ConfigError, MalformedFileError

__all__ = [
    "Anchor",
    "AnchorKind",
    "AnchorResult",
    "LevelConstraints",
    "ReferenceEvents",
    "level_constraints",
    "read_reference_events",
    "recentre_median",
    "reference_event_priors",
    "reference_unit_weights",
]


class AnchorKind(StrEnum):
    """The four anchors of docs/model.md §3."""

    REFERENCE_SET = "reference_set"
    MEDIAN = "median"
    REFERENCE_EVENTS = "reference_events"
    MEAN_MAGNITUDE = "mean_magnitude"


@dataclass(frozen=True, slots=True, eq=False)
class ReferenceEvents:
    """Events of known magnitude (e.g. Mw from moment tensors) used as anchor A3.

    Attributes
    ----------
    event_id : ndarray of str, shape (n,)
        Event identifiers, as in the station-magnitude store; unique.
    magnitude : ndarray of float, shape (n,)
        Known magnitude M*_j, magnitude units.
    uncertainty : ndarray of float, shape (n,)
        SD s*_j of M*_j, magnitude units; 0 makes M_j = M*_j a hard constraint.
    """

    event_id: NDArray[Any]
    magnitude: NDArray[np.float64]
    uncertainty: NDArray[np.float64] = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        ids = np.asarray(self.event_id).astype(str).astype(object)
        mag = np.asarray(self.magnitude, dtype=np.float64)
        unc = np.asarray(self.uncertainty, dtype=np.float64)
        if unc.shape[0] == 0:
            unc = np.zeros(mag.shape[0])
        if not (ids.shape[0] == mag.shape[0] == unc.shape[0]):
            raise ValueError("ReferenceEvents: event_id, magnitude, uncertainty differ in length")
        if not np.all(np.isfinite(mag)):
            raise ValueError("ReferenceEvents: every magnitude must be finite")
        if not np.all(np.isfinite(unc) & (unc >= 0)):
            raise ValueError("ReferenceEvents: uncertainties must be finite and >= 0")
        if np.unique(ids).shape[0] != ids.shape[0]:
            raise ValueError("ReferenceEvents: event ids must be unique")
        object.__setattr__(self, "event_id", ids)
        object.__setattr__(self, "magnitude", mag)
        object.__setattr__(self, "uncertainty", unc)


def read_reference_events(path: str | Path) -> ReferenceEvents:
    """Read reference events from a CSV with header ``event_id,magnitude[,uncertainty]``.

    Parameters
    ----------
    path : str or Path
        UTF-8 CSV; ``uncertainty`` (SD, magnitude units) may be absent or empty (hard constraint).

    Returns
    -------
    ReferenceEvents

    Raises
    ------
    FileNotFoundError
        If the file does not exist.
    MalformedFileError
        Missing column, unparsable or negative number, or duplicate event id; the message
        names the file, the line and the fix.
    """
    p = Path(path)
    if not p.is_file():
        raise FileNotFoundError(f"{p}: reference-events file not found")
    ids: list[str] = []
    mags: list[float] = []
    uncs: list[float] = []
    with p.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        header = [h.strip() for h in (reader.fieldnames or [])]
        for col in ("event_id", "magnitude"):
            if col not in header:
                raise MalformedFileError(
                    f"{p}, line 1: column {col!r} is missing; the header must be "
                    "event_id,magnitude[,uncertainty]"
                )
        seen: set[str] = set()
        for row in reader:
            line = reader.line_num
            clean = {(k or "").strip(): (v or "").strip() for k, v in row.items()}
            eid = clean.get("event_id", "")
            if not eid:
                raise MalformedFileError(
                    f"{p}, line {line}: empty event_id; fill it or drop the row"
                )
            if eid in seen:
                raise MalformedFileError(
                    f"{p}, line {line}: event {eid!r} is listed twice; keep one row per event"
                )
            seen.add(eid)
            mag = _parse_float(clean.get("magnitude", ""), p, line, "magnitude")
            unc_text = clean.get("uncertainty", "")
            unc = 0.0 if unc_text == "" else _parse_float(unc_text, p, line, "uncertainty")
            if unc < 0:
                raise MalformedFileError(
                    f"{p}, line {line}: uncertainty {unc} is negative; give an SD >= 0"
                )
            ids.append(eid)
            mags.append(mag)
            uncs.append(unc)
    if not ids:
        raise MalformedFileError(f"{p}: no reference events; add rows event_id,magnitude")
    return ReferenceEvents(
        event_id=np.array(ids, dtype=object),
        magnitude=np.array(mags),
        uncertainty=np.array(uncs),
    )


def _parse_float(text: str, path: Path, line: int, column: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise MalformedFileError(
            f"{path}, line {line}: {column} {text!r} is not a number; write e.g. 4.2"
        ) from None
    if not math.isfinite(value):
        raise MalformedFileError(f"{path}, line {line}: {column} {text!r} is not finite")
    return value


@dataclass(frozen=True, slots=True, eq=False)
class Anchor:
    """How the fit fixes the level (see module docstring).

    Parameters
    ----------
    kind : AnchorKind, default="reference_set"
    reference_stations : tuple of str, default=()
        Station ids (``NET.STA.LOC``) of the reference set R; empty means every station.
    reference_weights : tuple of float, default=()
        Relative weights ϖ of the reference stations (> 0, normalised internally); empty means
        equal weights.
    value : float, default=0.0
        B_R at first calibration (A1, A2), magnitude units.
    reference_events : ReferenceEvents, optional
        Required for A3.
    mean_magnitude : float, default=nan
        Known mean magnitude, required for A4.
    previous : StationParameters, optional
        The previous model, for continuity of A1/A2 across refits (docs/rolling-fit.md §4).
    """

    kind: AnchorKind = AnchorKind.REFERENCE_SET
    reference_stations: tuple[str, ...] = ()
    reference_weights: tuple[float, ...] = ()
    value: float = 0.0
    reference_events: ReferenceEvents | None = None
    mean_magnitude: float = float("nan")
    previous: StationParameters | None = None

    def __post_init__(self) -> None:
        try:
            kind = AnchorKind(self.kind)
        except ValueError:
            allowed = ", ".join(k.value for k in AnchorKind)
            raise ConfigError(
                f"The 'anchor' parameter must be one of {allowed}. Got {self.kind!r} instead."
            ) from None
        object.__setattr__(self, "kind", kind)
        if self.reference_weights and len(self.reference_weights) != len(self.reference_stations):
            raise ConfigError(
                "reference_weights must have one weight per reference station "
                f"({len(self.reference_stations)}); got {len(self.reference_weights)}"
            )
        if any(not (w > 0 and math.isfinite(w)) for w in self.reference_weights):
            raise ConfigError("reference_weights must be finite and > 0")
        if not math.isfinite(self.value):
            raise ConfigError(f"anchor value must be finite; got {self.value}")
        if kind is AnchorKind.REFERENCE_EVENTS and self.reference_events is None:
            raise ConfigError(
                "anchor 'reference_events' needs reference events; set reference_events_csv"
            )
        if kind is AnchorKind.MEAN_MAGNITUDE and not math.isfinite(self.mean_magnitude):
            raise ConfigError("anchor 'mean_magnitude' needs a finite mean_magnitude")

    def with_previous(self, previous: StationParameters | None) -> Anchor:
        """The same anchor carrying the previous model for continuity."""
        return Anchor(
            kind=self.kind,
            reference_stations=self.reference_stations,
            reference_weights=self.reference_weights,
            value=self.value,
            reference_events=self.reference_events,
            mean_magnitude=self.mean_magnitude,
            previous=previous,
        )


@dataclass(frozen=True, slots=True)
class AnchorResult:
    """The anchor of a fitted model.

    Attributes
    ----------
    kind : AnchorKind
    value : float
        The level after the fit, magnitude units: Σ_R ϖ_i b̂_i (median over R for A2). Store
        it: the next refit carries it (continuity).
    se : float
        Network calibration uncertainty, the SD of the common level (module docstring),
        magnitude units. It is not part of the per-event SEs.
    n_reference : int
        Reference units (A1, A2), reference events used (A3) or fitted events (A4).
    continuity : bool
        True when the level was carried over from a previous model.
    """

    kind: AnchorKind
    value: float
    se: float
    n_reference: int
    continuity: bool


def reference_unit_weights(
    anchor: Anchor, unit_station: NDArray[Any], weight_sum: NDArray[np.float64]
) -> NDArray[np.float64]:
    """ϖ per station unit, normalised to sum 1 over the units that have data.

    Parameters
    ----------
    anchor : Anchor
    unit_station : ndarray of str, shape (K,)
        Station id of each unit.
    weight_sum : ndarray of float, shape (K,)
        Σγ of each unit; units without data (0) get no weight, and a station's weight is
        shared among its units in proportion to Σγ.

    Returns
    -------
    ndarray of float, shape (K,)
        Zero outside R; all zero when no reference unit has data.
    """
    st = np.asarray(unit_station).astype(str)
    ws = np.asarray(weight_sum, dtype=np.float64)
    if anchor.reference_stations:
        ref = np.asarray(anchor.reference_stations, dtype=str)
        wref = (
            np.asarray(anchor.reference_weights, dtype=np.float64)
            if anchor.reference_weights
            else np.ones(ref.shape[0])
        )
        sorter = np.argsort(ref)
        pos = np.clip(np.searchsorted(ref, st, sorter=sorter), 0, ref.shape[0] - 1)
        hit = ref[sorter[pos]] == st
        station_w = np.where(hit, wref[sorter[pos]], 0.0)
    else:
        station_w = np.ones(st.shape[0])
    # Share a station's weight among its units by Σγ.
    _, code = np.unique(st, return_inverse=True)
    total = np.bincount(code, weights=ws)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(total[code] > 0, ws / total[code], 0.0)
    w = station_w * share
    s = w.sum()
    return w / s if s > 0 else w


@dataclass(frozen=True, slots=True, eq=False)
class LevelConstraints:
    """Per-component level constraints of the b-step (built by :func:`level_constraints`).

    Constraint c reads Σ_i weight_i (b_i − offset_i) = level_c Σ_i weight_i over the units with
    group_i = c (a weighted mean); groups are disjoint, at most one per component. In matrix
    form C'b = B with C[i, c] = weight_i and B = :attr:`target`.

    Attributes
    ----------
    weight : ndarray, shape (K,)
        Constraint coefficient of each unit (0 when the unit is in no constraint).
    group : ndarray of int, shape (K,)
        Constraint index of each unit, -1 if none.
    offset : ndarray, shape (K,)
        The previous model's bias on units tied by continuity, else 0.
    level : ndarray, shape (n_constraints,)
        Level of each constraint (magnitude units).
    median : bool
        A2: after each solve, re-centre each constrained component so that the median of
        b − offset over its group equals the level (:func:`recentre_median`).
    prior_mean : float
        μ0, the level the bias prior pulls toward.
    event_prior_mean : ndarray, shape (N,)
        M*_j of reference events (NaN elsewhere).
    event_prior_precision : ndarray, shape (N,)
        1/s*_j² (``inf`` for a hard constraint, 0 for ordinary events).
    mean_magnitude : float
        A4 target (NaN unless A4). The A4 constraint depends on the current GLS weights and is
        built each iteration by the fit; ``weight`` then holds only the fallbacks.
    component_anchored : ndarray of bool, shape (n_components,)
    reference_weight : ndarray, shape (K,)
        ϖ normalised over the reference units with data (for the reported value).
    continuity : bool
        The level was carried over from a previous model.
    """

    weight: NDArray[np.float64]
    group: NDArray[np.int64]
    offset: NDArray[np.float64]
    level: NDArray[np.float64]
    median: bool
    prior_mean: float
    event_prior_mean: NDArray[np.float64]
    event_prior_precision: NDArray[np.float64]
    mean_magnitude: float
    component_anchored: NDArray[np.bool_]
    reference_weight: NDArray[np.float64]
    continuity: bool

    @property
    def n_constraints(self) -> int:
        """Number of constraints (columns of C)."""
        return int(self.level.shape[0])

    @property
    def target(self) -> NDArray[np.float64]:
        """B of C'b = B: level_c Σ weight + Σ weight·offset per group."""
        g = self.group
        sel = g >= 0
        n = self.n_constraints
        wsum = np.bincount(g[sel], weights=self.weight[sel], minlength=n)
        woff = np.bincount(g[sel], weights=(self.weight * self.offset)[sel], minlength=n)
        return np.asarray(self.level * wsum + woff, dtype=np.float64)


def reference_event_priors(
    anchor: Anchor, event_ids: NDArray[Any]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Prior mean M*_j and precision 1/s*_j² of each event (A3); NaN and 0 elsewhere.

    Parameters
    ----------
    anchor : Anchor
        Any kind; only A3 yields priors.
    event_ids : ndarray of str, shape (N,)

    Returns
    -------
    mean, precision : ndarray, shape (N,)
        ``precision`` is ``inf`` for a hard constraint (uncertainty 0).
    """
    N = np.asarray(event_ids).shape[0]
    mean = np.full(N, np.nan)
    prec = np.zeros(N)
    if anchor.kind is not AnchorKind.REFERENCE_EVENTS or anchor.reference_events is None:
        return mean, prec
    ref = anchor.reference_events
    pos = index_of(ref.event_id.astype(str), np.asarray(event_ids).astype(str))
    hit = pos >= 0
    mean[hit] = ref.magnitude[pos[hit]]
    unc = ref.uncertainty[pos[hit]]
    safe = np.where(unc > 0, unc, 1.0)
    prec[hit] = np.where(unc > 0, 1.0 / safe**2, np.inf)
    return mean, prec


def level_constraints(
    anchor: Anchor,
    *,
    unit_ids: NDArray[Any],
    unit_station: NDArray[Any],
    weight_sum: NDArray[np.float64],
    component: NDArray[np.int64],
    n_components: int,
    event_ids: NDArray[Any],
    event_in_component: NDArray[np.int64],
    previous_match: NDArray[np.int64] | None = None,
) -> LevelConstraints:
    """Translate an :class:`Anchor` into per-component constraints (see module docstring).

    Parameters
    ----------
    anchor : Anchor
    unit_ids, unit_station : ndarray of str, shape (K,)
        Unit ids and their station ids.
    weight_sum : ndarray, shape (K,)
        Σγ per unit over the fitted events.
    component : ndarray of int, shape (K,)
        Component of each unit (-1: not in the fit).
    n_components : int
    event_ids : ndarray of str, shape (N,)
    event_in_component : ndarray of int, shape (N,)
        Component of each event (-1: not fitted).
    previous_match : ndarray of int, shape (K,), optional
        Index of the previous unit matching each unit
        (:func:`fusion.model.forgetting.match_previous_units`); default: match by unit id.

    Returns
    -------
    LevelConstraints

    Notes
    -----
    Continuity (A1, A2 with ``anchor.previous``): the overlap O holds the reference units that
    the previous model also has (``previous_match``). A component holding overlap units is
    tied to the previous biases there: Σ_O ϖ (b − b_prev) = 0 (A1) or median_O (b − b_prev) = 0
    (A2). A component with reference units but no overlap takes the previous level, the
    weighted mean (A1) or median (A2) of b_prev over O (docs/rolling-fit.md §4: "when R changes
    compute the new B_R from stations overlapping in the window").
    """
    K = unit_ids.shape[0]
    N = event_ids.shape[0]
    kind = anchor.kind
    active = component >= 0
    comp0 = np.maximum(component, 0)
    ref_w = np.where(active, reference_unit_weights(anchor, unit_station, weight_sum), 0.0)
    s = ref_w.sum()
    ref_w = ref_w / s if s > 0 else ref_w

    ev_mean = np.full(N, np.nan)
    ev_prec = np.zeros(N)
    anchored = np.zeros(n_components, dtype=bool)
    weight = np.zeros(K)
    offset = np.zeros(K)
    level_c = np.zeros(n_components)
    prior_mean = 0.0
    continuity = False

    if kind in (AnchorKind.REFERENCE_SET, AnchorKind.MEDIAN):
        in_ref = ref_w > 0
        level = float(anchor.value)
        weight = ref_w.copy()
        level_c = np.full(n_components, level)
        prev = anchor.previous
        if prev is not None:
            pos = (
                index_of(prev.unit_ids.astype(str), np.asarray(unit_ids).astype(str))
                if previous_match is None
                else np.asarray(previous_match, dtype=np.int64)
            )
            overlap = in_ref & (pos >= 0)
            if np.any(overlap):
                continuity = True
                prev_b = np.where(pos >= 0, prev.bias[np.maximum(pos, 0)], 0.0)
                ov_w = ref_w[overlap] / ref_w[overlap].sum()
                level = (
                    float(np.median(prev_b[overlap]))
                    if kind is AnchorKind.MEDIAN
                    else float(np.dot(ov_w, prev_b[overlap]))
                )
                comp_has_ov = np.bincount(component[overlap], minlength=n_components) > 0
                tied = active & comp_has_ov[comp0]
                weight = np.where(tied, np.where(overlap, ref_w, 0.0), ref_w)
                offset = np.where(tied & overlap, prev_b, 0.0)
                level_c = np.where(comp_has_ov, 0.0, level)
        anchored[component[weight > 0]] = True
        prior_mean = level
    elif kind is AnchorKind.REFERENCE_EVENTS:
        ev_mean, ev_prec = reference_event_priors(anchor, event_ids)
        hit_ev = (ev_prec > 0) & (event_in_component >= 0)
        ev_mean = np.where(hit_ev, ev_mean, np.nan)
        ev_prec = np.where(hit_ev, ev_prec, 0.0)
        anchored[event_in_component[hit_ev]] = True
    else:  # A4: every component with fitted events carries the mean-magnitude constraint
        fitted = event_in_component[event_in_component >= 0]
        anchored[:] = np.bincount(fitted, minlength=n_components) > 0

    # Fallback for unanchored components: mean bias over the component = μ0.
    loose = active & ~anchored[comp0]
    n_units = np.bincount(component[active], minlength=n_components)
    weight = np.where(loose, 1.0 / np.maximum(n_units[comp0], 1), weight)
    offset = np.where(loose, 0.0, offset)
    level_c = np.where(anchored, level_c, prior_mean)

    # One constraint per component that has constraint weight.
    in_c = (weight > 0) & active
    has_c = np.bincount(component[in_c], minlength=n_components) > 0
    c_index = np.cumsum(has_c) - 1
    group = np.where(in_c, c_index[comp0], -1).astype(np.int64)
    return LevelConstraints(
        weight=np.where(in_c, weight, 0.0),
        group=group,
        offset=np.where(in_c, offset, 0.0),
        level=level_c[has_c],
        median=kind is AnchorKind.MEDIAN,
        prior_mean=prior_mean,
        event_prior_mean=ev_mean,
        event_prior_precision=ev_prec,
        mean_magnitude=(
            float(anchor.mean_magnitude) if kind is AnchorKind.MEAN_MAGNITUDE else float("nan")
        ),
        component_anchored=anchored,
        reference_weight=ref_w,
        continuity=continuity,
    )


def recentre_median(
    bias: NDArray[np.float64], constraints: LevelConstraints, component: NDArray[np.int64]
) -> NDArray[np.float64]:
    """A2: shift each constrained component so that median(b − offset) over its group = level.

    Parameters
    ----------
    bias : ndarray, shape (K,)
    constraints : LevelConstraints
    component : ndarray of int, shape (K,)

    Returns
    -------
    ndarray, shape (K,)
        Shifted biases (a copy). Loops over constraints (components), never over events.
    """
    out = bias.copy()
    g = constraints.group
    comp_of_group = np.full(constraints.n_constraints, -1, dtype=np.int64)
    comp_of_group[g[g >= 0]] = component[g >= 0]
    for c in range(constraints.n_constraints):
        members = g == c
        med = float(np.median(out[members] - constraints.offset[members]))
        out[component == comp_of_group[c]] += constraints.level[c] - med
    return out
