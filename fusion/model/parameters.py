"""Fitted station parameters: the hand-over between learning and the network estimate.

A learned model is, for one magnitude type, a table of *station units*: a station, or one epoch
of a station whose bias stepped (docs/epochs.md). Each unit has a bias b_i with its sampling
variance Var(b̂_i), a moderated error variance σ̃_i² and flags; flagged pairs carry an error
covariance. Everything downstream (network magnitudes, dry runs, reports) takes a
:class:`StationParameters` and never refits.

Unit ids are ``NET.STA.LOC`` for a station's first epoch and ``NET.STA.LOC@YYYY-MM-DD`` (the
epoch start, UTC) for later epochs, so ids stay readable and stable across refits.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from fusion.network.gls_blocks import PairCovariance

__all__ = ["StationParameters", "epoch_unit_id"]


def epoch_unit_id(station_id: str, start: np.datetime64 | None) -> str:
    """Unit id of a station epoch: the station id, plus ``@YYYY-MM-DD`` after the first epoch."""
    if start is None or np.isnat(start):
        return station_id
    return f"{station_id}@{np.datetime_as_string(start, unit='D')}"


@dataclass(frozen=True, slots=True, eq=False)
class StationParameters:
    """Station-unit parameters of one magnitude type.

    Attributes
    ----------
    magnitude_type : str
    unit_ids : ndarray of str, shape (K,)
        See module docstring.
    station_ids : ndarray of str, shape (K,)
        ``NET.STA.LOC`` of each unit.
    epoch_start, epoch_end : ndarray of datetime64[us], shape (K,)
        UTC bounds of each unit; NaT means open (the first epoch starts at NaT, the last ends
        at NaT). A reading at time t belongs to the unit with start <= t < end.
    bias : ndarray, shape (K,)
        b̂_i, magnitude units, relative to the anchor (docs/model.md §3).
    bias_var : ndarray, shape (K,)
        Var(b̂_i), magnitude units squared (docs/estimator.md §5).
    sigma2 : ndarray, shape (K,)
        Moderated error variance σ̃_i², magnitude units squared (docs/estimator.md §5).
    prior_dominated : ndarray of bool, shape (K,)
        d_i < d0: the prior carries more information than the data (docs/estimator.md §5.3).
    pairs : PairCovariance
        Flagged pairs with the (shrunk, capped) covariance used in the network estimate.
    tau_b2 : float
        Prior variance of a bias relative to the anchor; an unknown station gets bias 0 with
        this variance (docs/estimator.md §5).
    s0_2 : float
        Prior error variance s0²; an unknown station gets σ² = s0².
    """

    magnitude_type: str
    unit_ids: NDArray[Any]
    station_ids: NDArray[Any]
    epoch_start: NDArray[np.datetime64]
    epoch_end: NDArray[np.datetime64]
    bias: NDArray[np.float64]
    bias_var: NDArray[np.float64]
    sigma2: NDArray[np.float64]
    prior_dominated: NDArray[np.bool_]
    pairs: PairCovariance
    tau_b2: float
    s0_2: float

    @property
    def n_units(self) -> int:
        """K, the number of station units."""
        return int(self.unit_ids.shape[0])

    def assign_units(
        self, station_id: NDArray[Any], time: NDArray[np.datetime64]
    ) -> NDArray[np.int64]:
        """Unit index of each reading, or -1 for a station (or period) the model does not know.

        Parameters
        ----------
        station_id : ndarray of str, shape (n,)
            ``NET.STA.LOC`` of each reading.
        time : ndarray of datetime64, shape (n,)
            Origin time of each reading (UTC).

        Notes
        -----
        Vectorized: units are sorted by (station, start); each reading finds its station's block
        with ``searchsorted`` and then the last epoch whose start <= t, looping only over the
        (few) epochs per station, never over readings. NaT bounds are open.
        """
        sid = np.asarray(station_id).astype(str)
        t = np.asarray(time).astype("datetime64[us]").astype(np.int64)
        unit_sid = self.station_ids.astype(str)
        lowest, highest = np.iinfo(np.int64).min, np.iinfo(np.int64).max  # NaT is int64 min
        start = self.epoch_start.astype("datetime64[us]").astype(np.int64)
        end = self.epoch_end.astype("datetime64[us]").astype(np.int64)
        end = np.where(end == lowest, highest, end)
        order = np.lexsort((start, unit_sid))
        s_sid, s_start, s_end = unit_sid[order], start[order], end[order]
        lo = np.searchsorted(s_sid, sid, side="left")
        hi = np.searchsorted(s_sid, sid, side="right")
        pos = np.full(sid.shape[0], -1, dtype=np.int64)
        max_epochs = int((hi - lo).max(initial=0))
        for e in range(max_epochs):
            cand = lo + e
            ok = cand < hi
            ok[ok] &= s_start[cand[ok]] <= t[ok]
            pos[ok] = cand[ok]
        out = np.full(sid.shape[0], -1, dtype=np.int64)
        hit = pos >= 0
        hit[hit] &= t[hit] < s_end[pos[hit]]
        out[hit] = order[pos[hit]]
        return out
