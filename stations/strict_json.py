"""Strict JSON (RFC 8259) for everything magfuse prints or writes.

Python's :func:`json.dumps` writes ``NaN``, ``Infinity`` and ``-Infinity`` by default; RFC 8259
§6 has no such tokens and strict parsers refuse them. Every JSON document magfuse emits (command
``--json`` output, files in the store, export sidecars, API bodies) goes through :func:`dumps`,
which turns every non-finite float into ``null``, numpy scalars and arrays into plain numbers and
lists, paths and dates into strings, and then serialises with ``allow_nan=False`` so that a value
that slipped through fails loudly instead of producing invalid JSON.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from collections.abc import Mapping
from pathlib import PurePath
from typing import Any

import numpy as np

__all__ = ["dumps", "to_jsonable"]


def to_jsonable(value: Any) -> Any:
    """Return ``value`` as plain JSON types, with non-finite numbers as ``None``.

    Mappings become dicts with string keys, sequences (tuples, lists, sets, numpy arrays) become
    lists, numpy and Python floats that are NaN or infinite become ``None``, numpy integers and
    booleans become ``int`` and ``bool``, and paths, dates and other objects become ``str``.
    """
    if value is None or isinstance(value, bool | str):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, Mapping):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, list | tuple | set | frozenset):
        items = sorted(value, key=str) if isinstance(value, set | frozenset) else value
        return [to_jsonable(v) for v in items]
    if isinstance(value, _dt.datetime | _dt.date):
        return value.isoformat()
    if isinstance(value, np.datetime64):
        return None if np.isnat(value) else str(value)
    if isinstance(value, PurePath):
        return str(value)
    if hasattr(value, "to_dict"):
        return to_jsonable(value.to_dict())
    try:  # pandas.NA / NaT and similar missing-value singletons
        import pandas as pd

        if value is pd.NaT or value is pd.NA:
            return None
        if isinstance(value, pd.Timestamp):
            return value.isoformat()
    except ImportError:  # pragma: no cover - pandas is a core dependency
        pass
    return str(value)


def dumps(value: Any, **kwargs: Any) -> str:
    """Serialise ``value`` to strict JSON; keyword arguments go to :func:`json.dumps`.

    Raises
    ------
    ValueError
        Never for non-finite floats (they become ``null``); only if a caller passes
        ``allow_nan=True``, which is refused.
    """
    if kwargs.pop("allow_nan", False):
        raise ValueError("magfuse writes strict JSON only; allow_nan=True is not supported")
    kwargs.pop("default", None)
    try:  # plain data (the common case) serialises directly, without a converted copy
        return json.dumps(value, allow_nan=False, **kwargs)
    except (TypeError, ValueError):
        return json.dumps(to_jsonable(value), allow_nan=False, **kwargs)
