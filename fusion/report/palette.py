"""Colours and figure defaults of the report: readable with colour-vision deficiency.

Colours are the eight-colour set of Okabe & Ito (2008), chosen so that people with protan,
deutan and tritan deficiencies still tell them apart, republished with the same RGB values by
Wong (2011). Every categorical distinction in the figures is carried by marker shape or line
style as well as colour, so no information rests on hue alone. Continuous quantities are not
colour-coded.

References
----------
Okabe M., Ito K. (2008). Color Universal Design (CUD): how to make figures and presentations
that are friendly to colorblind people. J*Fly, https://jfly.uni-koeln.de/color/ (first version
2002).
Wong B. (2011). Points of view: color blindness. Nature Methods 8(6):441.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Final

__all__ = ["OKABE_ITO", "RC", "ROLE"]

#: Okabe & Ito (2008) colours, RGB 0-255 as published: black (0, 0, 0), orange (230, 159, 0),
#: sky blue (86, 180, 233), bluish green (0, 158, 115), yellow (240, 228, 66), blue (0, 114, 178),
#: vermillion (213, 94, 0), reddish purple (204, 121, 167).
OKABE_ITO: Final = MappingProxyType(
    {
        "black": "#000000",
        "orange": "#E69F00",
        "sky_blue": "#56B4E9",
        "bluish_green": "#009E73",
        "yellow": "#F0E442",
        "blue": "#0072B2",
        "vermillion": "#D55E00",
        "reddish_purple": "#CC79A7",
    }
)

#: What each colour means in every figure of the report (one meaning per colour).
ROLE: Final = MappingProxyType(
    {
        "network": OKABE_ITO["black"],  # fused (network) magnitude, solid line
        "plain_mean": OKABE_ITO["orange"],  # plain mean of raw station magnitudes, dashed
        "station": OKABE_ITO["blue"],  # corrected station magnitudes, circles
        "raw": "#7F7F7F",  # raw (uncorrected) station magnitudes, small grey dots
        "outlier": OKABE_ITO["vermillion"],  # down-weighted readings, crosses
        "nondetection": OKABE_ITO["sky_blue"],  # non-detections at their threshold, triangles
        "trend": OKABE_ITO["reddish_purple"],  # fitted trends, dash-dot lines
        "model": OKABE_ITO["bluish_green"],  # fitted distributions and intervals
        "alarm": OKABE_ITO["vermillion"],  # drift alarms, dotted vertical lines
        "epoch": OKABE_ITO["black"],  # epoch boundaries, solid thin vertical lines
        "positive": OKABE_ITO["vermillion"],  # positive residual (map), upward triangle
        "negative": OKABE_ITO["blue"],  # negative residual (map), downward triangle
    }
)

#: matplotlib rc settings applied while drawing (no global state is changed).
RC: Final = MappingProxyType(
    {
        "font.size": 9.0,
        "axes.titlesize": 10.0,
        "axes.labelsize": 9.0,
        "legend.fontsize": 8.0,
        "axes.grid": True,
        "grid.alpha": 0.3,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "figure.dpi": 100.0,
        "savefig.dpi": 80.0,
        "path.simplify": True,
    }
)
