"""Paths of the real open data the tests read (``tests/data/``; licence and provenance there)."""

from __future__ import annotations

from pathlib import Path

__all__ = ["DATA_DIR", "YELLOWSTONE", "YELLOWSTONE_CSV"]

#: The folder of committed test data sets.
DATA_DIR = Path(__file__).resolve().parent / "data"
#: UUSS Yellowstone station ML table (Holt, Pechmann & Koper 2022; MIT licence).
YELLOWSTONE = DATA_DIR / "yellowstone-uuss"
#: Its one CSV file.
YELLOWSTONE_CSV = YELLOWSTONE / "station_ml_geobalanced.csv"
