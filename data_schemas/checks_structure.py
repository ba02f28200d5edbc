"""Checks on the shape of a table before any column is read: column names that repeat, and
cells that hold more than one value (lists, arrays, mappings from Parquet or a DataFrame).

Each check returns what it found (or None) as plain values; ``reading`` turns a finding into
the problem reported on the file's line.
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

_SCALAR_KINDS = {
    "string",
    "bytes",
    "floating",
    "integer",
    "mixed-integer-float",
    "decimal",
    "boolean",
    "datetime",
    "date",
    "time",
    "timedelta",
    "categorical",
    "empty",
}
_NESTED_TYPES = (list, tuple, dict, set, np.ndarray, pd.Series)


@dataclass(frozen=True)
class DuplicateColumn:
    """Column ``name`` appears at 1-based positions ``first`` and ``again`` of the header
    (names compared after removing surrounding spaces, as every reader does)."""

    name: str
    first: int
    again: int


@dataclass(frozen=True)
class NestedCell:
    """The first cell of ``column`` holding a list-like value: data row ``row`` (0-based),
    of Python type ``type_name``."""

    column: str
    row: int
    type_name: str


def header_fields(first_line: str, sep: str) -> list[str]:
    """The header's field names as the CSV reader sees them (quotes honoured)."""
    fields = next(csv.reader([first_line.lstrip("\ufeff")], delimiter=sep), [])
    return [str(name) for name in fields]


def duplicate_column(names: Sequence[object]) -> DuplicateColumn | None:
    """The first column name that repeats once surrounding spaces are removed."""
    seen: dict[str, int] = {}
    for position, raw in enumerate(names, start=1):
        name = str(raw).strip()
        if name in seen:
            return DuplicateColumn(name, seen[name], position)
        seen[name] = position
    return None


def nested_cell(frame: pd.DataFrame) -> NestedCell | None:
    """The first list-like cell in any object column (columns whose values pandas already
    knows to be scalars are skipped without looking at each cell)."""
    for position, name in enumerate(frame.columns):
        series = frame.iloc[:, position]
        if series.dtype != object:
            continue
        if pd.api.types.infer_dtype(series, skipna=True) in _SCALAR_KINDS:
            continue
        flags = series.map(lambda value: isinstance(value, _NESTED_TYPES)).to_numpy(dtype=bool)
        if flags.any():
            row = int(np.argmax(flags))
            return NestedCell(str(name), row, type(series.iloc[row]).__name__)
    return None
