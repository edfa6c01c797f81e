"""What every reader returns, and the plug-in record of one format.

A format is one module ``stations/readers/<format>.py`` with a strict, cheap detector
``is_<format>(path) -> bool`` and a reader ``read_<format>(path, *, magnitude_range, ...) ->
ReadResult`` (ObsPy's plug-in shape, docs/conventions.md items 9-10). :mod:`stations.readers` keeps
the one registry and the dispatcher.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import pandas as pd

from stations.errors import ConfigError
from stations.schema import normalise_station_id

__all__ = [
    "DEFAULT_NETWORK",
    "FormatSpec",
    "ReadResult",
    "check_default_network",
    "display_path",
]

#: Network code given to stations whose source names none (IMS1.0 and NEIC "mchedr" bulletins
#: list bare station codes). A readable placeholder, chosen by magfuse: it is a valid network
#: code under the FDSN source identifier specification v1.0 (1-8 characters A-Z 0-9), so the
#: station ids pass :func:`stations.schema.normalise_station_id`; pass the real network with
#: ``default_network=`` when all stations of a file belong to one.
DEFAULT_NETWORK: Final = "UNKNOWN"


@dataclass(frozen=True, slots=True)
class ReadResult:
    """Station magnitudes read from one file, split into validated records and rejects.

    Attributes
    ----------
    source_file : str
        The path as the caller gave it.
    records : DataFrame
        Validated rows, columns :data:`stations.schema.INPUT_COLUMNS` in that order, dtypes of
        :data:`stations.validation.INPUT_SCHEMA` as pandas reads them from Arrow:
        ``origin_time`` ``datetime64[us, UTC]``; numbers ``float64`` (NaN = unknown);
        ``detected`` and ``clipped`` ``bool``; text in pandas' default string dtype (NaN =
        none). ``pa.Table.from_pandas(records, schema=INPUT_SCHEMA, preserve_index=False)``
        gives the Arrow table.
    rejected : DataFrame
        Rows that failed validation or could not be parsed: ``source_file``,
        ``source_location`` (e.g. ``"line 12"``, ``"event 2 / station magnitude 5"``),
        ``reason`` (what is wrong and how to fix it), ``raw`` (the row as read, JSON text).
    """

    source_file: str
    records: pd.DataFrame
    rejected: pd.DataFrame


@dataclass(frozen=True, slots=True)
class FormatSpec:
    """One registry entry: a format name, its detector and its reader.

    ``takes_network`` is True for readers with a ``default_network`` keyword (bulletins whose
    station codes may carry no network code).
    """

    name: str
    detect: Callable[[Any], bool]
    read: Callable[..., ReadResult]
    takes_network: bool = False


def check_default_network(default_network: str) -> str:
    """Return ``default_network`` upper-cased, or raise :class:`ConfigError` if it is no code.

    Raises
    ------
    ConfigError
        If the code is not 1-8 characters A-Z 0-9 (FDSN source identifier specification v1.0).
    """
    try:
        normalise_station_id(default_network, "X")
    except (ValueError, AttributeError):
        raise ConfigError(
            f"default_network {default_network!r} is not a network code; give 1-8 "
            "characters A-Z 0-9"
        ) from None
    return default_network.strip().upper()


def display_path(path: Path | str) -> str:
    """The path as the caller gave it, as text (``str(Path)`` keeps relative paths relative)."""
    return str(path)
