"""Summaries of a table of network magnitudes that several outputs share.

:func:`censoring_summary` describes the use of non-detections in an event table
(:class:`fusion.network.network_magnitude.FusedMagnitudes` ``events``): the dry run
(:mod:`fusion.workflows.dry_run`) prints it before and after a model change, the station report
(:mod:`fusion.report.writer`) writes it as a paragraph. The censored estimate itself is
described in docs/censoring.md.

:func:`plain_mean_difference` and :func:`difference_summary` describe how far the network
magnitudes lie from the plain mean of the raw station magnitudes (the station report's
network summary; any caller comparing two estimates per event).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

__all__ = ["censoring_summary", "difference_summary", "plain_mean_difference"]


def censoring_summary(events: pd.DataFrame) -> dict[str, Any]:
    """Use of non-detections in an event table (:class:`FusedMagnitudes` ``events``).

    Returns
    -------
    dict
        ``n_events`` (with a magnitude), ``n_used`` (events re-estimated with non-detections
        or clipped readings, method ``censored-likelihood``), ``n_nondetections`` (non-detections
        they
        used), ``shift`` (n, mean, median, max_abs, n_ge_0_1 = events moved by 0.1 or more, and
        quantiles 5 / 25 / 50 / 75 / 95 % of censored − GLS magnitude, magnitude units),
        ``n_uncorrected`` (flag ``censoring-uncorrected``) and ``n_likely_biased_high``.
    """
    mag = pd.to_numeric(events["magnitude"]).to_numpy(dtype=float)
    has = np.isfinite(mag)
    method = events["method"].astype(str).to_numpy() if "method" in events else None
    used = has & (method == "censored-likelihood") if method is not None else np.zeros_like(has)
    flags = events["flags"].fillna("").astype(str) if "flags" in events else None

    def flagged(name: str) -> int:
        if flags is None:
            return 0
        hit = flags.str.contains(f"(?:^|;){name}(?:;|$)", regex=True).to_numpy(dtype=bool)
        return int(np.count_nonzero(hit & has))

    n_nd = 0
    if "n_nondetections_used" in events:
        n_nd = int(pd.to_numeric(events["n_nondetections_used"]).to_numpy()[has].sum())
    shift: dict[str, Any] = {"n": int(np.count_nonzero(used))}
    if "censoring_shift" in events and np.any(used):
        v = pd.to_numeric(events["censoring_shift"]).to_numpy(dtype=float)[used]
        v = v[np.isfinite(v)]
        if v.shape[0]:
            shift.update(
                mean=float(v.mean()),
                median=float(np.median(v)),
                max_abs=float(np.abs(v).max()),
                n_ge_0_1=int(np.count_nonzero(np.abs(v) >= 0.1)),
                quantiles={str(q): float(np.quantile(v, q)) for q in (0.05, 0.25, 0.5, 0.75, 0.95)},
            )
    return {
        "n_events": int(np.count_nonzero(has)),
        "n_used": int(np.count_nonzero(used)),
        "n_nondetections": n_nd,
        "shift": shift,
        "n_uncorrected": flagged("censoring-uncorrected"),
        "n_likely_biased_high": flagged("likely-biased-high"),
    }


def plain_mean_difference(events: pd.DataFrame) -> NDArray[np.float64]:
    """Network magnitude minus the plain mean of the raw station magnitudes, per event.

    The ``minus_plain_mean`` column when present, else ``magnitude − plain_mean``
    (magnitude units; NaN where either is missing).
    """
    if "minus_plain_mean" in events.columns:
        return np.asarray(pd.to_numeric(events["minus_plain_mean"]).to_numpy(dtype=float))
    return np.asarray(
        pd.to_numeric(events["magnitude"]).to_numpy(dtype=float)
        - pd.to_numeric(events["plain_mean"]).to_numpy(dtype=float)
    )


def difference_summary(d: NDArray[np.float64], *, moved: float = 0.1) -> dict[str, Any]:
    """Median, 5 % and 95 % quantiles and the count |d| >= ``moved`` of the finite values.

    Parameters
    ----------
    d : ndarray
        Per-event differences, magnitude units (NaN ignored).
    moved : float, default=0.1
        Threshold of the count ``n_ge_0_1``, magnitude units.

    Returns
    -------
    dict
        ``n`` (finite values) and, when n > 0, ``median``, ``q05``, ``q95``, ``n_ge_0_1``.
    """
    fin = d[np.isfinite(d)]
    if not fin.shape[0]:
        return {"n": 0}
    return {
        "n": int(fin.shape[0]),
        "median": float(np.median(fin)),
        "q05": float(np.quantile(fin, 0.05)),
        "q95": float(np.quantile(fin, 0.95)),
        "n_ge_0_1": int(np.count_nonzero(np.abs(fin) >= moved)),
    }
