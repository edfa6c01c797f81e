"""The invented demo network: station magnitudes of one year with the truth beside them.

Everything in this folder is invented (region, network and station codes, coordinates, events,
readings); ``README.md`` gives the provenance and what each file exercises, and
:mod:`sample_events.generate_demo` rewrites the files byte for byte from its seed. This module
only hands out paths, so importing it costs nothing.

Examples
--------
>>> from sample_events import demo_csv_path, demo_truth_paths
>>> demo_csv_path().name
'demo_network_2025.csv'
>>> demo_truth_paths().stations.name
'demo_truth_stations.csv'
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Final

__all__ = [
    "FILE_NAMES",
    "SAMPLE_DIR",
    "DemoTruthPaths",
    "demo_csv_path",
    "demo_quakeml_path",
    "demo_stations_path",
    "demo_truth_paths",
]

#: The folder holding the demo files (this package's folder).
SAMPLE_DIR: Final = Path(__file__).resolve().parent

#: File names of the demo, by role; the generator writes exactly these.
FILE_NAMES: Final = {
    "csv": "demo_network_2025.csv",
    "quakeml": "demo_network_2025_december.xml",
    "stations": "stations.csv",
    "truth_stations": "demo_truth_stations.csv",
    "truth_events": "demo_truth_events.csv",
    "truth_pairs": "demo_truth_pairs.csv",
    "truth_steps": "demo_truth_steps.csv",
    "truth_outliers": "demo_truth_outliers.csv",
}


@dataclass(frozen=True, slots=True)
class DemoTruthPaths:
    """Paths of the truth tables written beside the demo data.

    Attributes
    ----------
    stations : Path
        ``station_id, bias, sigma, latitude, longitude, elevation, noise_amplitude_nm,
        clip_amplitude_nm, notes``: one row per station-location (bias and sigma in magnitude
        units, coordinates in degrees, elevation in m, amplitudes in nm).
    events : Path
        ``event_id, origin_time, latitude, longitude, depth, magnitude, zone``: the kept events
        with their true magnitude (depth in km).
    pairs : Path
        ``station_id_1, station_id_2, rho, kind, notes``: the correlated pairs.
    steps : Path
        ``station_id, time, step, bias_before, bias_after, notes``: the bias step.
    outliers : Path
        ``event_id, station_id, offset, detected``: readings that carry an outlier term.
    """

    stations: Path
    events: Path
    pairs: Path
    steps: Path
    outliers: Path


def _existing(key: str) -> Path:
    path = SAMPLE_DIR / FILE_NAMES[key]
    if not path.is_file():
        raise FileNotFoundError(
            f"{path}: demo file missing; rebuild it with python -m sample_events.generate_demo"
        )
    return path


def demo_csv_path() -> Path:
    """The demo station magnitudes (detections and non-detections of 2025), CSV.

    Raises
    ------
    FileNotFoundError
        If the file is missing (rebuild with ``python -m sample_events.generate_demo``); the
        same holds for every function here.
    """
    return _existing("csv")


def demo_quakeml_path() -> Path:
    """The December 2025 events of the demo as QuakeML 1.2 (amplitudes, station and network
    magnitudes with contributions)."""
    return _existing("quakeml")


def demo_stations_path() -> Path:
    """Station metadata epochs (network, station, location, latitude, longitude, elevation,
    start, end), CSV."""
    return _existing("stations")


def demo_truth_paths() -> DemoTruthPaths:
    """Paths of the five truth tables (see :class:`DemoTruthPaths`)."""
    return DemoTruthPaths(
        stations=_existing("truth_stations"),
        events=_existing("truth_events"),
        pairs=_existing("truth_pairs"),
        steps=_existing("truth_steps"),
        outliers=_existing("truth_outliers"),
    )
