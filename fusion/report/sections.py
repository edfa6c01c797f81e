"""Which stations get a full section in the HTML report.

Drawing a station's four panels costs about 0.3 s (measured with ``bench/report_speed.py``:
46 figures in 15 s on 2 cores), so a 2,000-station network would need some ten minutes for
all of them, far beyond the report's one-minute budget, and nobody would read them. The rule
(also printed in the report):

1. The ``top_by_weight`` stations with the largest weight share always get a section: they
   move the network magnitudes most.
2. The remaining places, up to ``max_sections``, go to stations with an attention flag
   (:data:`fusion.report.station_table.ATTENTION_FLAGS`), most flags first, then the largest
   |t| of their trend and offset tests, then weight share.
3. Every other station is a row of the station table (and of the CSV and Parquet files), with
   the same numbers but no figure.

Sections appear in that priority order: flagged stations first, then the heavy ones.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from fusion.report.station_table import ATTENTION_FLAGS
from stations.errors import ConfigError

__all__ = ["attention_mask", "select_section_stations"]


def attention_mask(table: pd.DataFrame) -> np.ndarray:
    """True for units whose ``flags`` hold at least one attention flag."""
    flags = table["flags"].fillna("").astype(str)
    pattern = "|".join(sorted(f"(?:^|;){f}(?:;|$)" for f in ATTENTION_FLAGS))
    return np.asarray(flags.str.contains(pattern, regex=True), dtype=bool)


def _unique_in_order(values: np.ndarray) -> list[str]:
    _, first = np.unique(values, return_index=True)
    return [str(values[i]) for i in np.sort(first)]


def select_section_stations(
    table: pd.DataFrame, *, max_sections: int = 40, top_by_weight: int = 10
) -> list[str]:
    """Station ids that get a full section, in section order (module docstring).

    Parameters
    ----------
    table : pandas.DataFrame
        :func:`~fusion.report.station_table.station_reliability_table` output.
    max_sections : int, default=40
        At most this many sections (0: none).
    top_by_weight : int, default=10
        Heaviest stations that always get one (capped at ``max_sections``).

    Raises
    ------
    ConfigError
        If a count is negative.
    """
    for name, value in (("max_sections", max_sections), ("top_by_weight", top_by_weight)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
            raise ConfigError(
                f"The {name!r} parameter of select_section_stations must be an int in the "
                f"range [0, inf). Got {value!r} instead."
            )
    if max_sections == 0 or not len(table):
        return []
    sid = table["station_id"].astype(str).to_numpy()
    share = np.nan_to_num(pd.to_numeric(table["weight_share"]).to_numpy(dtype=float), nan=-1.0)
    heavy_order = np.argsort(-share, kind="stable")
    heavy = _unique_in_order(sid[heavy_order])[: min(top_by_weight, max_sections)]
    att = attention_mask(table)
    flags = table["flags"].fillna("").astype(str)
    n_flags = np.zeros(len(table), dtype=np.int64)
    for f in ATTENTION_FLAGS:
        n_flags += np.asarray(flags.str.contains(f"(?:^|;){f}(?:;|$)", regex=True), dtype=np.int64)
    tt = np.column_stack(
        [
            pd.to_numeric(table[c]).to_numpy(dtype=float)
            for c in ("distance_t", "magnitude_t", "residual_mean_t")
        ]
    )
    tmax = np.max(np.where(np.isfinite(tt), np.abs(tt), 0.0), axis=1)
    idx = np.flatnonzero(att)
    order = idx[np.lexsort((-share[idx], -tmax[idx], -n_flags[idx]))]
    heavy_set = set(heavy)
    flagged = _unique_in_order(sid[order])
    room = max(0, max_sections - len(heavy))
    extra = [s for s in flagged if s not in heavy_set][:room]
    chosen = set(extra) | heavy_set
    first = [s for s in flagged if s in chosen]
    return first + [s for s in heavy if s not in set(first)]
