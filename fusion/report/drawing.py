"""Matplotlib plumbing: figures without pyplot, PNG bytes, binned quantiles.

matplotlib is imported inside the functions (``magfuse --help`` must not pay for it) and used
through :class:`matplotlib.figure.Figure` directly, never ``pyplot``: no global figure registry,
no GUI backend, PNG rendering by Agg. This is the way matplotlib recommends for servers
("Embed in a web application server", matplotlib gallery, since matplotlib 3.1).
"""

from __future__ import annotations

import base64
import io
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from fusion.report.palette import RC

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["binned_quantiles", "new_figure", "png_bytes", "png_data_uri"]


@contextmanager
def new_figure(
    width_in: float,
    height_in: float,
    *,
    left: float = 0.8,
    right: float = 0.25,
    bottom: float = 0.6,
    top: float = 0.4,
    wspace: float = 0.25,
    hspace: float = 0.45,
) -> Iterator[Figure]:
    """A fresh :class:`~matplotlib.figure.Figure` drawn under the report's rc settings
    (:data:`fusion.report.palette.RC`; restored on exit).

    Margins are fixed, in inches (``wspace``/``hspace`` as fractions of the mean axes size):
    matplotlib's automatic layout engines measure every tick label and cost about half of
    the drawing time, which matters for a report with dozens of figures.
    """
    import matplotlib
    from matplotlib.figure import Figure

    rc: dict[Any, Any] = dict(RC)
    with matplotlib.rc_context(rc):
        fig = Figure(figsize=(width_in, height_in))
        fig.subplots_adjust(
            left=left / width_in,
            right=1.0 - right / width_in,
            bottom=bottom / height_in,
            top=1.0 - top / height_in,
            wspace=wspace,
            hspace=hspace,
        )
        yield fig


def png_bytes(fig: Figure, dpi: float | None = None) -> bytes:
    """Render ``fig`` to PNG with Agg (no 'Software' tag, so equal figures give equal bytes)."""
    buf = io.BytesIO()
    kw: dict[str, Any] = {"format": "png", "metadata": {"Software": None}}
    if dpi is not None:
        kw["dpi"] = dpi
    fig.savefig(buf, **kw)
    return buf.getvalue()


def png_data_uri(png: bytes) -> str:
    """``data:image/png;base64,...`` for an ``<img src>`` (RFC 2397)."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def binned_quantiles(
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    edges: NDArray[np.float64],
    quantiles: tuple[float, ...] = (0.1, 0.5, 0.9),
    *,
    min_count: int = 5,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.int64]]:
    """Quantiles of ``y`` in bins of ``x`` (vectorized: one sort, no loop over bins).

    Parameters
    ----------
    x, y : ndarray, shape (n,)
        Finite pairs are used.
    edges : ndarray, shape (B + 1,)
        Increasing bin edges; bin b is [edges[b], edges[b + 1]), the last bin closed.
    quantiles : tuple of float
        Levels in [0, 1].
    min_count : int, default=5
        Bins with fewer values get NaN.

    Returns
    -------
    centre : ndarray, shape (B,)
        Bin centres.
    q : ndarray, shape (len(quantiles), B)
        Linear-interpolated quantiles (numpy's default 'linear' method, Hyndman & Fan 1996
        definition 7).
    count : ndarray of int, shape (B,)
    """
    ok = np.isfinite(x) & np.isfinite(y)
    xv, yv = x[ok], y[ok]
    B = edges.shape[0] - 1
    b = np.clip(np.searchsorted(edges, xv, side="right") - 1, 0, B - 1)
    order = np.lexsort((yv, b))
    b, yv = b[order], yv[order]
    count = np.bincount(b, minlength=B).astype(np.int64)
    start = np.concatenate(([0], np.cumsum(count)[:-1]))
    out = np.full((len(quantiles), B), np.nan)
    has = count >= max(min_count, 1)
    for i, q in enumerate(quantiles):
        pos = start + q * (count - 1)
        lo = np.floor(pos).astype(np.int64)
        hi = np.minimum(lo + 1, start + count - 1)
        frac = pos - lo
        lo_c = np.clip(lo, 0, max(yv.shape[0] - 1, 0))
        hi_c = np.clip(hi, 0, max(yv.shape[0] - 1, 0))
        if yv.shape[0]:
            val = yv[lo_c] * (1.0 - frac) + yv[hi_c] * frac
            out[i] = np.where(has, val, np.nan)
    centre = 0.5 * (edges[:-1] + edges[1:])
    return centre, out, count
