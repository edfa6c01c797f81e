"""Counts in the text people read: one rule for plurals and for thousands separators.

Human text writes every count with thousands separators (``1,052 events``) and the noun in
the number it needs (``1 bias step``, ``2 bias steps``). Machine output (``--json``, CSV,
Parquet, QuakeML) writes plain numbers without separators; it never goes through this module.
"""

from __future__ import annotations

__all__ = ["count", "number"]


def number(n: int) -> str:
    """An integer count with thousands separators.

    >>> number(2390), number(7)
    ('2,390', '7')
    """
    return f"{int(n):,}"


def count(n: int, noun: str, plural: str | None = None) -> str:
    """``n`` and the noun, singular for exactly one, else plural (default: noun + "s").

    Parameters
    ----------
    n : int
        The count.
    noun : str
        Singular form; in a phrase, the last word takes the plural (``"bias step"``).
    plural : str, optional
        Irregular plural of the whole phrase (``"station epochs"`` is regular; ``"batches"``
        is not).

    >>> count(1, "bias step"), count(2, "bias step"), count(1052, "event")
    ('1 bias step', '2 bias steps', '1,052 events')
    >>> count(1, "batch", "batches"), count(0, "batch", "batches")
    ('1 batch', '0 batches')
    """
    word = noun if int(n) == 1 else (plural if plural is not None else noun + "s")
    return f"{number(n)} {word}"
