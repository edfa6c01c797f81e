"""Delimited text tables read as strings with pyarrow, then converted column by column.

Shared by the CSV-like readers. Reading every cell as text first keeps a bad cell from aborting
the file: it becomes a rejected row naming the column and the value, and the rest is read. A
line with the wrong number of fields is skipped by pyarrow and reported with its line number
(``use_threads=False`` keeps pyarrow's row numbers, which count physical lines, header
included). Blank lines are dropped without a report; line numbers still count them. Quoted
fields must not contain line breaks.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
from numpy.typing import NDArray

from stations import strict_json
from stations.errors import MalformedFileError
from stations.validation import Reasons, rejected_frame

__all__ = [
    "StringTable",
    "line_locations",
    "parse_booleans",
    "parse_numbers",
    "parse_times",
    "read_header",
    "read_string_table",
    "sort_by_line",
]

_MAX_HEADER_BYTES: Final = 1 << 16
_TRUE: Final = frozenset({"true", "t", "yes", "y", "1"})
_FALSE: Final = frozenset({"false", "f", "no", "n", "0"})


def read_header(path: Path, shown: str, *, hint: str) -> list[str]:
    """Column names of line 1 (BOM and surrounding quotes/spaces removed).

    Raises
    ------
    MalformedFileError
        If line 1 is empty or not UTF-8; ``hint`` ends the message (what the header should be).
    """
    with open(path, "rb") as fh:
        first = fh.readline(_MAX_HEADER_BYTES)
    if not first.strip():
        raise MalformedFileError(f"{shown}: line 1: no header line; {hint}")
    try:
        text = first.decode("utf-8").removeprefix("\ufeff").rstrip("\r\n")
    except UnicodeDecodeError:
        raise MalformedFileError(
            f"{shown}: line 1: not UTF-8 text; save the file as UTF-8"
        ) from None
    return [name.strip().strip('"').strip() for name in text.split(",")]


@dataclass(frozen=True, slots=True)
class StringTable:
    """The non-blank data rows of a file as text, with their physical line numbers.

    Attributes
    ----------
    table : pyarrow.Table
        One string column per header name; cells are ``""`` when empty.
    lines : ndarray of int64, shape (n_rows,)
        Line number of each row (the header is line 1).
    rejected : DataFrame
        Lines with the wrong number of fields (columns of
        :data:`stations.validation.REJECTED_COLUMNS`).
    """

    table: pa.Table
    lines: NDArray[np.int64]
    rejected: pd.DataFrame

    def raw(self, idx: NDArray[np.int64]) -> list[str]:
        """JSON text of the rows at positions ``idx`` (a :data:`~stations.validation.RawRows`)."""
        return [strict_json.dumps(row) for row in self.table.take(pa.array(idx)).to_pylist()]


def _parse(
    path: Path, names: list[str], *, threads: bool
) -> tuple[pa.Table, list[tuple[Any, str, int, int]]]:
    invalid: list[tuple[Any, str, int, int]] = []

    def on_invalid(row: Any) -> str:  # pyarrow calls this for malformed rows only
        invalid.append((row.number, row.text, row.expected_columns, row.actual_columns))
        return "skip"

    table = pa_csv.read_csv(
        path,
        read_options=pa_csv.ReadOptions(
            column_names=names, skip_rows=1, use_threads=threads, block_size=1 << 24
        ),
        parse_options=pa_csv.ParseOptions(invalid_row_handler=on_invalid, ignore_empty_lines=False),
        convert_options=pa_csv.ConvertOptions(
            column_types=dict.fromkeys(names, pa.string()),
            strings_can_be_null=False,
            quoted_strings_can_be_null=False,
        ),
    )
    return table, invalid


def read_string_table(path: Path, shown: str, names: list[str]) -> StringTable:
    """Read the lines after the header as strings (see the module docstring).

    The file is parsed with threads first; only if it holds malformed lines is it parsed again
    on one thread, which is what makes pyarrow report their line numbers.

    Raises
    ------
    MalformedFileError
        If the text is not UTF-8 or pyarrow cannot tokenise it.
    """
    try:
        table, invalid = _parse(path, names, threads=True)
        if invalid:
            table, invalid = _parse(path, names, threads=False)
    except pa.ArrowInvalid as exc:
        detail = str(exc).splitlines()[0]
        fix = "save it as UTF-8" if "UTF8" in detail else "fix the CSV syntax"
        raise MalformedFileError(f"{shown}: cannot be read as CSV ({detail}); {fix}") from None
    if any(number is None for number, *_ in invalid):  # pyarrow numbers rows on one thread
        raise MalformedFileError(f"{shown}: a malformed line could not be located; fix the CSV")
    bad_lines = np.asarray([int(number) for number, *_ in invalid], dtype=np.int64)
    every = np.arange(2, 2 + table.num_rows + bad_lines.shape[0], dtype=np.int64)
    lines = np.setdiff1d(every, bad_lines, assume_unique=True)

    blank = np.ones(table.num_rows, dtype=bool)
    for name in names:
        blank &= pc.equal(pc.utf8_trim_whitespace(table.column(name)), "").to_numpy(
            zero_copy_only=False
        )
    rejected = rejected_frame(
        shown,
        [f"line {number}" for number, *_ in invalid],
        [
            f"line has {got} fields, expected {expected}; fix the commas or quote the field "
            "that contains one"
            for _, _, expected, got in invalid
        ],
        [json.dumps({"text": text}) for _, text, *_ in invalid],
    )
    if blank.any():
        table = table.filter(pa.array(~blank))
    return StringTable(table, lines[~blank], rejected)


def line_locations(lines: NDArray[np.int64]) -> pd.Series:
    """``"line N"`` texts for line numbers (an Arrow-backed string column)."""
    text = pc.binary_join_element_wise("line ", pa.array(lines).cast(pa.string()), "")
    return pd.Series(text.to_pandas(), copy=False)


def parse_numbers(text: pa.ChunkedArray, name: str, reasons: Reasons) -> NDArray[np.float64]:
    """Cells as float64 (empty or ``nan`` -> NaN); a non-number is NaN plus a reason."""
    trimmed = pc.utf8_trim_whitespace(text)
    blank = pc.equal(trimmed, "")
    try:
        values = pc.cast(pc.if_else(blank, None, trimmed), pa.float64())
        return np.asarray(values.to_numpy(zero_copy_only=False), dtype=np.float64)
    except pa.ArrowInvalid:
        pass  # at least one cell is not a number: locate them with a coercing parse
    series = pd.Series(trimmed.to_numpy(zero_copy_only=False), dtype=object)
    parsed = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    bad = (series != "").to_numpy() & np.isnan(parsed) & (series.str.lower() != "nan").to_numpy()
    reasons.add_each(bad, series, name + " {} is not a number; correct it")
    return np.where(bad, np.nan, parsed)


def parse_booleans(
    text: pa.ChunkedArray, name: str, default: bool, reasons: Reasons
) -> NDArray[np.bool_]:
    """Cells as bool: true/t/yes/y/1, false/f/no/n/0 (any case); empty -> ``default``."""
    lowered = pc.utf8_lower(pc.utf8_trim_whitespace(text))
    is_true = pc.is_in(lowered, value_set=pa.array(sorted(_TRUE))).to_numpy(zero_copy_only=False)
    is_false = pc.is_in(lowered, value_set=pa.array(sorted(_FALSE))).to_numpy(zero_copy_only=False)
    blank = pc.equal(lowered, "").to_numpy(zero_copy_only=False)
    bad = ~is_true & ~is_false & ~blank
    reasons.add_each(bad, lowered, name + " {} is not true or false; write true or false")
    return np.where(is_true, True, np.where(is_false, False, default))


def parse_times(text: pa.ChunkedArray | pa.Array) -> pd.Series:
    """ISO 8601 cells as ``datetime64[us, UTC]`` (offsets converted, naive = UTC, bad = NaT).

    Each distinct text is parsed once: an event's time repeats over its stations.
    """
    trimmed = pc.utf8_trim_whitespace(text)
    if isinstance(trimmed, pa.ChunkedArray):
        trimmed = trimmed.combine_chunks()
    encoded = pc.dictionary_encode(trimmed)
    uniques = pd.Series(encoded.dictionary.to_pylist(), dtype=object)
    parsed = pd.to_datetime(uniques, utc=True, format="ISO8601", errors="coerce")
    codes = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.intp)
    return parsed.take(codes).reset_index(drop=True).astype("datetime64[us, UTC]")


def sort_by_line(rejected: pd.DataFrame) -> pd.DataFrame:
    """Rejected rows ordered by their ``"line N"`` location (stable)."""
    if rejected.empty:
        return rejected
    key = rejected["source_location"].str.removeprefix("line ").astype(np.int64).to_numpy()
    return rejected.iloc[np.argsort(key, kind="stable")].reset_index(drop=True)
