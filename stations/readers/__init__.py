"""Readers of station-magnitude files: one registry, one dispatcher.

Each format is a module ``stations.readers.<format>`` with a strict detector
``is_<format>(path)`` and a reader ``read_<format>(path, ...)``; the format's documentation
(columns, units, mapping to the record schema, a usage example) is that module's docstring.

============ ================================================= ===============================
format       what                                              module
============ ================================================= ===============================
parquet      Parquet in the record layout (e.g. an export)     :mod:`.parquet`
quakeml      QuakeML 1.2 (through ObsPy)                       :mod:`.quakeml`
ims10        IMS1.0 short-form bulletins (through ObsPy)       :mod:`.ims10`
mchedr       NEIC PDE "mchedr" reports (through ObsPy)         :mod:`.mchedr`
yellowstone  the Holt, Pechmann & Koper (2022) station-ML table :mod:`.yellowstone`
csv          magfuse's own CSV layout, with non-detections     :mod:`.csv`
============ ================================================= ===============================

**Event ids: one rule for every format.** Whatever a format calls its event identifier (a
QuakeML ``publicID`` such as ``smi:magfuse.invalid/demo2025/event/qv2025-02198``, the CSV's
``event_id`` column ``qv2025-02198``, an IMS1.0 bulletin's event number), a resource id (one
that starts with a scheme such as ``smi:`` or ``quakeml:``) is stored as its last non-empty
``/``-separated segment and any other id as it is, white space trimmed
(:func:`stations.schema.canonical_event_ids`, applied to every reader's rows by
:func:`stations.validation.validate_records`). The same event read from two formats is
therefore one event. Events that coincide in origin time and place with stored events under
*other* ids are refused by the store unless the operator allows them
(``magfuse ingest --allow-near-duplicates``).

:func:`read_records` probes in that order (the most specific signatures first, the generic
CSV header last) unless ``format=`` names one; ``format=`` is case-insensitive and also takes
ObsPy's names ``IMS10BULLETIN``.

Examples
--------
>>> from stations.readers import read_records, supported_formats
>>> from stations.readers.csv import template_path
>>> supported_formats()
('parquet', 'quakeml', 'ims10', 'mchedr', 'yellowstone', 'csv')
>>> result = read_records(template_path())
>>> len(result.records), len(result.rejected)
(2, 0)
"""

from __future__ import annotations

import errno
import os
from pathlib import Path
from typing import Final

from stations.errors import UnknownFormatError
from stations.readers import csv, ims10, mchedr, parquet, quakeml, yellowstone
from stations.readers.base import DEFAULT_NETWORK, FormatSpec, ReadResult, display_path
from stations.validation import DEFAULT_MAGNITUDE_RANGE

__all__ = [
    "DEFAULT_NETWORK",
    "REGISTRY",
    "ReadResult",
    "detect_format",
    "read_records",
    "supported_formats",
]

#: The formats in probing order.
REGISTRY: Final[tuple[FormatSpec, ...]] = (
    FormatSpec("parquet", parquet.is_parquet, parquet.read_parquet),
    FormatSpec("quakeml", quakeml.is_quakeml, quakeml.read_quakeml, takes_network=True),
    FormatSpec("ims10", ims10.is_ims10, ims10.read_ims10, takes_network=True),
    FormatSpec("mchedr", mchedr.is_mchedr, mchedr.read_mchedr, takes_network=True),
    FormatSpec("yellowstone", yellowstone.is_yellowstone, yellowstone.read_yellowstone),
    FormatSpec("csv", csv.is_csv, csv.read_csv),
)
_BY_NAME: Final = {spec.name: spec for spec in REGISTRY}
_ALIASES: Final = {"ims10bulletin": "ims10"}


def supported_formats() -> tuple[str, ...]:
    """Names of the formats, in the order :func:`read_records` probes them."""
    return tuple(spec.name for spec in REGISTRY)


def _lookup(format: str, shown: str) -> FormatSpec:
    key = format.strip().lower()
    spec = _BY_NAME.get(_ALIASES.get(key, key))
    if spec is None:
        raise UnknownFormatError(
            f"{shown}: unknown format {format!r}; use one of {', '.join(supported_formats())}"
        )
    return spec


def _existing(path: Path | str) -> tuple[Path, str]:
    shown = display_path(path)
    file = Path(path)
    if not file.exists():
        raise FileNotFoundError(errno.ENOENT, os.strerror(errno.ENOENT), shown)
    if file.is_dir():
        raise UnknownFormatError(f"{shown}: is a directory; pass one file of station magnitudes")
    return file, shown


def detect_format(path: Path | str) -> str:
    """Name of the first format whose detector accepts the file.

    Raises
    ------
    FileNotFoundError
        If the file does not exist.
    UnknownFormatError
        If it is a directory or no detector accepts it; the message lists the formats.
    """
    file, shown = _existing(path)
    for spec in REGISTRY:
        if spec.detect(file):
            return spec.name
    raise UnknownFormatError(
        f"{shown}: no reader recognises this file; supported formats: "
        f"{', '.join(supported_formats())}; name the format to see that reader's own error"
    )


def read_records(
    path: Path | str,
    format: str | None = None,
    *,
    magnitude_range: tuple[float, float] = DEFAULT_MAGNITUDE_RANGE,
    default_network: str = DEFAULT_NETWORK,
) -> ReadResult:
    """Read station magnitudes from ``path``, validated, in the record layout.

    Parameters
    ----------
    path : Path or str
        The file.
    format : str, optional
        One of :func:`supported_formats` (case-insensitive); ``None`` probes the formats in
        order.
    magnitude_range : (float, float), default=(-3.0, 10.0)
        Accepted station magnitudes, magnitude units (``[ingest] magnitude_min/max``).
    default_network : str, default="UNKNOWN"
        Network code for stations named without one (IMS1.0, mchedr, QuakeML waveform ids
        without ``networkCode``); ignored by the other formats.

    Returns
    -------
    ReadResult
        ``records`` in the columns of :data:`stations.schema.INPUT_COLUMNS`, ``rejected``
        with a reason per row.

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist (checked first).
    UnknownFormatError
        If ``format`` is not a known name, ``path`` is a directory, or no format recognises
        the file; the message lists the supported formats.
    MalformedFileError
        If the file is of the format but cannot be parsed (file, position, fix).
    ConfigError
        If ``magnitude_range`` or ``default_network`` is invalid.
    """
    file, shown = _existing(path)
    spec = _lookup(format, shown) if format is not None else _BY_NAME[detect_format(file)]
    if spec.takes_network:
        return spec.read(path, magnitude_range=magnitude_range, default_network=default_network)
    return spec.read(path, magnitude_range=magnitude_range)
