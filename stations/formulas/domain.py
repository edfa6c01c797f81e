"""Validity domains of the magnitude formulas and the one policy for inputs outside them.

Every formula first evaluates to an :class:`Evaluation`: the value wherever it can be computed,
and for each input a reason, empty inside the validity domain. Two kinds of reason differ:

- **out of domain**, computable: the standard does not cover the input (mb at 105 deg, Ms_20 at
  T = 25 s, ML at 1200 km) but the equation can be evaluated; the value is kept in
  :attr:`Evaluation.magnitude` so a caller can compute it with an explicit flag;
- **not computable**: a missing or non-positive input, or a table look-up outside the table;
  :attr:`Evaluation.magnitude` is NaN there.

:meth:`Evaluation.resolve` applies a :data:`DomainPolicy` (docs/conventions.md item 8):

=========== ==================================================================================
policy      result
=========== ==================================================================================
``raise``   :class:`~stations.errors.DomainError` naming the count, the first index and its
            reason, if any input is out of domain or not computable (default)
``nan``     NaN for every such input, with one :class:`OutOfDomainWarning`
``compute`` the computed value for out-of-domain inputs (the caller asked for it), NaN and one
            :class:`OutOfDomainWarning` for inputs that cannot be computed
=========== ==================================================================================
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Final, Literal, get_args

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import ConfigError, DomainError

__all__ = [
    "DomainPolicy",
    "Evaluation",
    "OutOfDomainWarning",
    "ReasonBuilder",
    "broadcast_float",
    "finish",
    "format_values",
    "require_positive",
    "require_range",
]

DomainPolicy = Literal["raise", "nan", "compute"]
_POLICIES: Final = get_args(DomainPolicy)


class OutOfDomainWarning(RuntimeWarning):
    """Some inputs of a magnitude formula were outside its validity domain or not computable."""


def format_values(values: ArrayLike, fmt: str = "%.6g") -> NDArray[np.str_]:
    """Format numbers for reason texts, vectorized (``np.char.mod``)."""
    return np.char.mod(fmt, np.asarray(values, dtype=np.float64))


class ReasonBuilder:
    """Collect per-input reasons; the first failing check of an input wins.

    Add the checks that make an input not computable first, then the domain checks, so that
    the most serious reason is the one reported.
    """

    __slots__ = ("computable", "reason")

    def __init__(self, shape: tuple[int, ...]) -> None:
        self.reason: NDArray[np.object_] = np.full(shape, "", dtype=object)
        self.computable: NDArray[np.bool_] = np.ones(shape, dtype=bool)

    def fail(
        self,
        mask: NDArray[np.bool_],
        message: str,
        *,
        computable: bool,
        values: NDArray[np.float64] | None = None,
    ) -> None:
        """Record ``message`` for the inputs in ``mask`` that have no reason yet.

        With ``values``, the first ``{}`` in ``message`` is replaced by each input's value
        (formatted only for the inputs that get the message).
        """
        if not np.any(mask):
            return
        fresh = mask & (self.reason == "")
        if values is None:
            self.reason[fresh] = message
        else:
            head, _, tail = message.partition("{}")
            shown = format_values(np.broadcast_to(values, fresh.shape)[fresh])
            self.reason[fresh] = np.char.add(np.char.add(head, shown), tail).astype(object)
        if not computable:
            self.computable &= ~mask


@dataclass(frozen=True, slots=True, eq=False)
class Evaluation:
    """A formula evaluated on arrays, with per-input domain reasons.

    Attributes
    ----------
    formula : str
        Label of the formula and table, as written to the record's ``formula`` column
        (e.g. ``"ML IASPEI-2013 HB87"``).
    magnitude : ndarray of float64
        Value wherever computable (also out of domain); NaN where not computable.
    reason : ndarray of object (str)
        Empty string inside the validity domain, else why not (first failing check).
    computable : ndarray of bool
        False where the value cannot be computed at all.
    """

    formula: str
    magnitude: NDArray[np.float64]
    reason: NDArray[np.object_]
    computable: NDArray[np.bool_]

    @property
    def in_domain(self) -> NDArray[np.bool_]:
        """True where the input lies inside the formula's validity domain."""
        return np.asarray(self.reason == "", dtype=bool)

    def resolve(self, policy: DomainPolicy) -> NDArray[np.float64]:
        """Apply ``policy`` (see the module docstring) and return the magnitudes.

        Raises
        ------
        DomainError
            With ``policy="raise"``, if any input is out of domain or not computable.
        ConfigError
            If ``policy`` is not one of ``raise``, ``nan``, ``compute``.

        Warns
        -----
        OutOfDomainWarning
            With ``policy="nan"`` for out-of-domain inputs, and with ``"nan"`` or
            ``"compute"`` for inputs that cannot be computed.
        """
        if policy not in _POLICIES:
            raise ConfigError(
                f"The 'policy' parameter of {self.formula} must be one of "
                f"{', '.join(_POLICIES)}. Got {policy!r} instead."
            )
        bad = ~self.in_domain
        n_bad = int(np.count_nonzero(bad))
        if n_bad == 0:
            return self.magnitude
        first = int(np.flatnonzero(bad.ravel())[0])
        detail = f"first at index {first}: {self.reason.ravel()[first]}"
        if policy == "raise":
            raise DomainError(
                f"{self.formula}: {n_bad} of {bad.size} inputs outside the validity domain or "
                f"not computable, {detail}; pass policy='nan' to get NaN for them or "
                "policy='compute' to compute the out-of-domain ones anyway"
            )
        if policy == "nan":
            out = self.magnitude.copy()
            out[bad] = np.nan
            warnings.warn(
                f"{self.formula}: {n_bad} of {bad.size} inputs set to NaN, {detail}",
                OutOfDomainWarning,
                stacklevel=3,
            )
            return out
        lost = ~self.computable
        n_lost = int(np.count_nonzero(lost))
        if n_lost:
            i = int(np.flatnonzero(lost.ravel())[0])
            warnings.warn(
                f"{self.formula}: {n_lost} of {bad.size} inputs cannot be computed and are NaN, "
                f"first at index {i}: {self.reason.ravel()[i]}",
                OutOfDomainWarning,
                stacklevel=3,
            )
        return self.magnitude


def require_positive(
    builder: ReasonBuilder, values: NDArray[np.float64], what: str, unit: str
) -> None:
    """Mark missing (NaN) and non-positive ``values`` as not computable (a log is taken)."""
    builder.fail(np.isnan(values), f"{what} is missing", computable=False)
    with np.errstate(invalid="ignore"):
        nonpos = values <= 0.0
    builder.fail(nonpos, f"{what} {{}} {unit} is not > 0", values=values, computable=False)


def require_range(
    builder: ReasonBuilder,
    values: NDArray[np.float64],
    low: float,
    high: float,
    *,
    what: str,
    unit: str,
    source: str,
    computable: bool = True,
    low_open: bool = False,
    high_open: bool = False,
) -> None:
    """Mark ``values`` outside [low, high] (ends open as asked); NaN values are not marked.

    The reason reads e.g. ``"distance 105 deg is above 100 deg (IASPEI 2013 standard range)"``.
    """
    with np.errstate(invalid="ignore"):
        below = values <= low if low_open else values < low
        above = values >= high if high_open else values > high
    low_word = "is not above" if low_open else "is below"
    high_word = "is not below" if high_open else "is above"
    builder.fail(
        below,
        f"{what} {{}} {unit} {low_word} {low:g} {unit} ({source})",
        values=values,
        computable=computable,
    )
    builder.fail(
        above,
        f"{what} {{}} {unit} {high_word} {high:g} {unit} ({source})",
        values=values,
        computable=computable,
    )


def broadcast_float(*arrays: ArrayLike) -> list[NDArray[np.float64]]:
    """Broadcast inputs against each other as float64 arrays (copies, safe to modify)."""
    return [np.array(a, dtype=np.float64) for a in np.broadcast_arrays(*arrays)]


def finish(formula: str, value: ArrayLike, reasons: ReasonBuilder) -> Evaluation:
    """Package a computed value as an :class:`Evaluation` (NaN where not computable)."""
    out = np.array(value, dtype=np.float64)
    out[~reasons.computable] = np.nan
    return Evaluation(
        formula=formula, magnitude=out, reason=reasons.reason, computable=reasons.computable
    )
