"""Exact row identity and row equality on Arrow tables, vectorised.

Keys are compared exactly (no hashing, so no collisions): each column is dictionary-encoded by
Arrow with nulls as a value of their own, and the per-column codes are combined into one
integer code per row. Two rows have the same code exactly when every column is equal, a null
matching only a null. Values are compared column by column with NaN equal to NaN and null equal
to null, as the store's duplicate rule asks.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

__all__ = ["ANNOTATION_COLUMNS", "decimals_of", "row_codes", "rows_equal", "rows_restate"]

#: Columns that annotate how the source used a reading rather than the reading itself: a
#: value only a restatement gives here is not a change (and is not merged in).
ANNOTATION_COLUMNS = ("source_weight", "formula")

#: Largest combined code before it is compacted again (keeps the arithmetic inside int64).
_CODE_LIMIT = 2**62


def _column_codes(column: pa.ChunkedArray | pa.Array) -> tuple[NDArray[np.int64], int]:
    arr = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    enc = pc.dictionary_encode(arr, null_encoding="encode")
    codes = enc.indices.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
    return codes, max(len(enc.dictionary), 1)


def row_codes(table: pa.Table, columns: Sequence[str]) -> NDArray[np.int64]:
    """Integer code per row, equal for two rows exactly when ``columns`` are all equal.

    Parameters
    ----------
    table : pyarrow.Table
    columns : sequence of str
        Columns forming the identity; nulls compare equal to nulls.

    Returns
    -------
    ndarray of int64, shape (n_rows,)
        Dense codes in ``[0, n_distinct)``.
    """
    n = table.num_rows
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    code = np.zeros(n, dtype=np.int64)
    span = 1
    for name in columns:
        codes, card = _column_codes(table.column(name))
        if span * card >= _CODE_LIMIT:
            code, uniques = pd.factorize(code)
            code = code.astype(np.int64, copy=False)
            span = max(len(uniques), 1)
        code = code * card + codes
        span *= card
    dense, _ = pd.factorize(code)
    return dense.astype(np.int64, copy=False)


def rows_equal(left: pa.Table, right: pa.Table, columns: Sequence[str]) -> NDArray[np.bool_]:
    """Element-wise row equality of two equally long tables over ``columns``.

    Null equals null and NaN equals NaN; floating-point values are otherwise compared exactly
    (they round-trip through Parquet bit for bit).

    Returns
    -------
    ndarray of bool, shape (n_rows,)
    """
    if left.num_rows != right.num_rows:
        raise ValueError("rows_equal: tables differ in length")
    same = np.ones(left.num_rows, dtype=bool)
    for name in columns:
        a = left.column(name)
        b = right.column(name)
        if not a.type.equals(b.type):
            b = b.cast(a.type)
        eq = pc.fill_null(pc.equal(a, b), False)
        floating = pa.types.is_floating(a.type)
        both_missing = pc.and_(
            pc.is_null(a, nan_is_null=floating), pc.is_null(b, nan_is_null=floating)
        )
        same &= pc.or_(eq, both_missing).to_numpy(zero_copy_only=False)
    return same


def decimals_of(values: NDArray[np.float64], *, most: int = 9) -> NDArray[np.int64]:
    """Decimal places each value was given with: the smallest d with round(x, d) == x.

    Parameters
    ----------
    values : ndarray of float
    most : int, default=9
        Values with more places (computed values) get ``most``.

    Returns
    -------
    ndarray of int
        Places per value; ``most`` for NaN.
    """
    x = np.asarray(values, dtype=float)
    out = np.full(x.shape, most, dtype=np.int64)
    undecided = np.isfinite(x)
    scale = np.maximum(np.abs(x), 1.0)
    for d in range(most):  # loop over decimal places, not rows
        hit = undecided & (np.abs(np.round(x, d) - x) <= 1e-9 * scale)
        out[hit] = d
        undecided &= ~hit
    return out


def _missing(arr: pa.ChunkedArray | pa.Array) -> NDArray[np.bool_]:
    floating = pa.types.is_floating(arr.type)
    return np.asarray(pc.is_null(arr, nan_is_null=floating).to_numpy(zero_copy_only=False))


def rows_restate(new: pa.Table, stored: pa.Table, columns: Sequence[str]) -> NDArray[np.bool_]:
    """Rows of ``new`` that restate the aligned row of ``stored`` and add no change to it.

    A row restates its stored reading when every value it carries agrees with the stored one:
    floating-point values within half a unit in the last decimal place of the stored value
    (a magnitude stored as ``4.337`` takes any value within 0.0005; the source rounded it to
    three places), other values exactly. A value the new row lacks (null or NaN) says nothing
    and never counts as a change. A value the stored row lacks and the new row gives is a
    change (e.g. a noise threshold added later), except for :data:`ANNOTATION_COLUMNS`
    (see the store's duplicate rule in :mod:`stations.store.batch`).

    Returns
    -------
    ndarray of bool, shape (n_rows,)
    """
    if new.num_rows != stored.num_rows:
        raise ValueError("rows_restate: tables differ in length")
    ok = np.ones(new.num_rows, dtype=bool)
    for name in columns:  # loop over columns, not rows
        a = new.column(name)
        b = stored.column(name)
        if not a.type.equals(b.type):
            b = b.cast(a.type)
        # the new row lacks it; or only the new row has an annotation of the source
        silent = _missing(a) | (_missing(b) & (name in ANNOTATION_COLUMNS))
        if pa.types.is_floating(a.type):
            a_f = a.to_numpy(zero_copy_only=False).astype(float)
            b_f = b.to_numpy(zero_copy_only=False).astype(float)
            tol = 0.5 * 10.0 ** -decimals_of(b_f).astype(float) + 1e-12
            with np.errstate(invalid="ignore"):
                agree = np.abs(a_f - b_f) <= tol
        else:
            agree = np.asarray(pc.fill_null(pc.equal(a, b), False).to_numpy(zero_copy_only=False))
        ok &= silent | agree
    return ok
