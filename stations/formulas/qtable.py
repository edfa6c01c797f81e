"""Distance-depth correction Q(Δ, h) for mb and mB_BB, from a shipped or user CSV grid.

Shipped tables (``stations/formulas/tables/``; each file's header comment gives source and
status):

================ ============================================================================
name             rows
================ ============================================================================
``GR56-Q``       h = 0: Gutenberg & Richter (1956) table for shallow shocks (PZ);
(default)        h = 500 km: G&R (1956) chart, digitised. 11 distances, 16-109 deg.
``GR56-chart-Q`` h = 0 and 500 km: the digitised G&R (1956) chart; same distances.
================ ============================================================================

Both transcribe the values J. C. Lahr's page "Computing body-wave (mb) magnitude" lists for
the G&R table and chart (verified, docs/check-values.md §2); the two renderings differ by up to 0.1
at h = 0. No machine-readable Q grid was found in a general library, and no further values are
sourced, so nothing else is shipped.

Interpolation: bilinear in (Δ, h), i.e. linear in Δ between the tabulated distances and linear
in h between the depth rows. With only the 0 and 500 km rows, **the depth interpolation is an
approximation** of the G&R chart, whose isolines are not linear in depth; and the 10 deg
sampling in Δ cannot reproduce structure of G&R's curve between the tabulated distances. A
fuller grid (e.g. transcribed from NMSOP-2 DS 3.1) drops in through :meth:`QTable.read_csv`.
Outside the grid Q is not defined (NaN): there is no extrapolation.

References
----------
Gutenberg, B., & Richter, C. F. (1956). Magnitude and energy of earthquakes. Annali di
Geofisica 9(1), 1-15.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Final

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import MalformedFileError

__all__ = ["GR56_CHART_Q", "GR56_Q", "Q_TABLES", "QTable"]

_HEADER: Final = ["depth_km", "distance_deg", "q"]


@dataclass(frozen=True, slots=True, eq=False)
class QTable:
    """A rectangular grid Q(Δ, h), interpolated bilinearly.

    Attributes
    ----------
    name : str
        Tag for the ``formula`` column (``"mb IASPEI-2013 <name>"``), one word.
    distance_deg : ndarray of float64, shape (n,)
        Epicentral distances of the grid columns, degrees, strictly increasing, n >= 2.
    depth_km : ndarray of float64, shape (m,)
        Depths of the grid rows, km below sea level, strictly increasing, m >= 2.
    q : ndarray of float64, shape (m, n)
        Q in magnitude units for A in um (mb = log10(A/T) + Q).
    reference : str
        Source of the values.
    """

    name: str
    distance_deg: NDArray[np.float64]
    depth_km: NDArray[np.float64]
    q: NDArray[np.float64]
    reference: str

    def __post_init__(self) -> None:
        d, h, q = self.distance_deg, self.depth_km, self.q
        if d.ndim != 1 or h.ndim != 1 or d.size < 2 or h.size < 2 or q.shape != (h.size, d.size):
            raise ValueError(
                f"Q table {self.name!r}: need >= 2 distances, >= 2 depths and q of shape "
                f"(depths, distances); got {q.shape} for {h.size} x {d.size}"
            )
        if np.any(np.diff(d) <= 0) or np.any(np.diff(h) <= 0):
            raise ValueError(f"Q table {self.name!r}: distances and depths must increase")
        if not np.all(np.isfinite(q)):
            raise ValueError(f"Q table {self.name!r}: every grid value must be finite")

    @property
    def distance_range(self) -> tuple[float, float]:
        """First and last tabulated distance, degrees."""
        return float(self.distance_deg[0]), float(self.distance_deg[-1])

    @property
    def depth_range(self) -> tuple[float, float]:
        """First and last tabulated depth, km."""
        return float(self.depth_km[0]), float(self.depth_km[-1])

    def __call__(self, distance_deg: ArrayLike, depth_km: ArrayLike) -> NDArray[np.float64]:
        """Q at (Δ, h) by bilinear interpolation; NaN outside the grid or for NaN input.

        Parameters
        ----------
        distance_deg : array_like of float
            Epicentral distance, degrees.
        depth_km : array_like of float
            Depth below sea level, km; broadcast against ``distance_deg``.

        Returns
        -------
        ndarray of float64
            Q (magnitude units, A in um).
        """
        dist, depth = (
            np.asarray(x, dtype=np.float64) for x in np.broadcast_arrays(distance_deg, depth_km)
        )
        d, h, q = self.distance_deg, self.depth_km, self.q
        with np.errstate(invalid="ignore"):
            inside = (dist >= d[0]) & (dist <= d[-1]) & (depth >= h[0]) & (depth <= h[-1])
        x = np.where(inside, dist, d[0])
        z = np.where(inside, depth, h[0])
        i = np.clip(np.searchsorted(d, x, side="right") - 1, 0, d.size - 2)
        k = np.clip(np.searchsorted(h, z, side="right") - 1, 0, h.size - 2)
        tx = (x - d[i]) / (d[i + 1] - d[i])
        tz = (z - h[k]) / (h[k + 1] - h[k])
        value = (
            (1 - tx) * (1 - tz) * q[k, i]
            + tx * (1 - tz) * q[k, i + 1]
            + (1 - tx) * tz * q[k + 1, i]
            + tx * tz * q[k + 1, i + 1]
        )
        return np.asarray(np.where(inside, value, np.nan), dtype=np.float64)

    @classmethod
    def read_csv(cls, path: Path, *, name: str) -> QTable:
        """Read a Q grid: CSV with header ``depth_km,distance_deg,q``, one row per grid point.

        Lines starting with ``#`` are comments (give the source there). Every depth must carry
        every distance (a full rectangular grid), at least two of each.

        Raises
        ------
        FileNotFoundError
            If ``path`` does not exist.
        MalformedFileError
            If the header, a number or the grid is wrong; the message names file and line.
        """
        path = Path(path)
        with path.open(newline="", encoding="utf-8") as handle:
            rows = [
                (n, r)
                for n, r in enumerate(csv.reader(handle), start=1)
                if r and not r[0].lstrip().startswith("#")
            ]
        if not rows or [c.strip() for c in rows[0][1]] != _HEADER:
            raise MalformedFileError(
                f"{path}: line {rows[0][0] if rows else 1}: the header must be "
                f"'{','.join(_HEADER)}'; fix the header"
            )
        triples = []
        for n, r in rows[1:]:
            try:
                if len(r) != 3:
                    raise ValueError
                triple = (float(r[0]), float(r[1]), float(r[2]))
            except ValueError:
                raise MalformedFileError(
                    f"{path}: line {n}: expected three numbers 'depth_km,distance_deg,q', got "
                    f"{','.join(r)!r}; fix the row"
                ) from None
            if not all(np.isfinite(triple)):
                raise MalformedFileError(f"{path}: line {n}: values must be finite; fix the row")
            triples.append(triple)
        data = np.array(triples, dtype=np.float64).reshape(-1, 3)
        depths, h_idx = np.unique(data[:, 0], return_inverse=True)
        dists, d_idx = np.unique(data[:, 1], return_inverse=True)
        grid = np.full((depths.size, dists.size), np.nan)
        counts = np.zeros(grid.shape, dtype=np.int64)
        np.add.at(counts, (h_idx, d_idx), 1)
        grid[h_idx, d_idx] = data[:, 2]
        if depths.size < 2 or dists.size < 2 or np.any(counts != 1):
            raise MalformedFileError(
                f"{path}: the rows must form a full grid with each (depth_km, distance_deg) "
                f"exactly once and at least two depths and two distances; found "
                f"{depths.size} depths x {dists.size} distances from {len(triples)} rows"
            )
        return cls(name=name, distance_deg=dists, depth_km=depths, q=grid, reference=str(path))


def _packaged(file: str, name: str) -> QTable:
    resource = resources.files("stations.formulas").joinpath("tables", file)
    with resources.as_file(resource) as path:
        table = QTable.read_csv(path, name=name)
    return QTable(
        name=name,
        distance_deg=table.distance_deg,
        depth_km=table.depth_km,
        q=table.q,
        reference=f"stations/formulas/tables/{file} (Gutenberg & Richter 1956; see its header)",
    )


#: Default Q: G&R (1956) shallow-shock table at h = 0, digitised chart at h = 500 km.
GR56_Q: Final = _packaged("gr56_pz_q.csv", "GR56-Q")
#: Q from the digitised G&R (1956) chart at h = 0 and 500 km.
GR56_CHART_Q: Final = _packaged("gr56_pz_chart_q.csv", "GR56-chart-Q")
#: Shipped Q tables by name.
Q_TABLES: Final[dict[str, QTable]] = {t.name: t for t in (GR56_Q, GR56_CHART_Q)}
