"""The one exception hierarchy of magfuse.

Every expected failure (bad input, a missing model, a busy store) raises a subclass of
:class:`MagfuseError`. The command line catches only this base class, prints
``Error: <message>`` on stderr and exits with status 1 (``fusion/cli/app.py``); anything else
keeps its traceback because it is a bug.

Messages follow one template: what went wrong, which value (file, row, column), and how to fix
it, on one line.

The hierarchy lives in ``stations`` (the lowest layer) so that both ``stations`` and ``fusion``
raise the same classes without ``stations`` importing ``fusion``.
"""

from __future__ import annotations

__all__ = [
    "ConfigError",
    "ConvergenceWarning",
    "DegenerateDataWarning",
    "DomainError",
    "EventNotFoundError",
    "InsufficientDataError",
    "MagfuseError",
    "MalformedFileError",
    "ModelNotFoundError",
    "NearDuplicateEventError",
    "NotFittedError",
    "SchemaError",
    "StationNotFoundError",
    "StoreBusyError",
    "StoreCorruptError",
    "StoreWriteError",
    "TooFewStationsWarning",
    "UnitError",
    "UnknownFormatError",
]


class MagfuseError(Exception):
    """Base class of every expected magfuse failure (bad input, missing model, busy store)."""


class ConfigError(MagfuseError, ValueError):
    """A configuration file or parameter is invalid (unknown key, out-of-range value)."""


class UnknownFormatError(MagfuseError, ValueError):
    """No reader recognises a file, or a named format does not exist."""


class MalformedFileError(MagfuseError, ValueError):
    """A file of a known format cannot be parsed; the message names file, position and fix."""


class SchemaError(MagfuseError, ValueError):
    """A table lacks a required column or a column has the wrong type."""


class UnitError(MagfuseError, ValueError):
    """An amplitude or distance unit is missing, unknown or does not fit the formula."""


class DomainError(MagfuseError, ValueError):
    """An input lies outside the validity domain of a magnitude formula."""


class StationNotFoundError(MagfuseError, KeyError):
    """A station has no metadata valid at the requested time."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class EventNotFoundError(MagfuseError, KeyError):
    """An event id is not in the store, the fused magnitudes or the window asked for."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class NearDuplicateEventError(MagfuseError, ValueError):
    """A batch holds events that coincide in time and place with stored events under other ids."""


class StoreBusyError(MagfuseError):
    """Another writer holds the store lock longer than the configured wait."""


class StoreCorruptError(MagfuseError):
    """The store manifest or a file it lists cannot be read."""


class StoreWriteError(MagfuseError):
    """The store cannot be written (read-only or full disk, no permission); names the store."""


class InsufficientDataError(MagfuseError, ValueError):
    """Too few events or stations to fit or to estimate what was asked."""


class ModelNotFoundError(MagfuseError, LookupError):
    """A model version (or the active model) does not exist."""


class NotFittedError(MagfuseError, ValueError, AttributeError):
    """A learned attribute was used before ``fit`` (scikit-learn's contract)."""


class ConvergenceWarning(UserWarning):
    """An iterative routine stopped at its iteration limit before meeting its tolerance."""


class TooFewStationsWarning(RuntimeWarning):
    """An estimate rests on fewer stations than its method needs to be reliable."""


class DegenerateDataWarning(RuntimeWarning):
    """Input is constant, empty or otherwise degenerate; a documented fallback was used."""
