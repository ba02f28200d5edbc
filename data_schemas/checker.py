"""Column-level checking of one raw table (structure and types): the ``Checker`` turns
each column into typed values with a validity mask and reports wrong types, empties, values
out of range and unknown labels; helpers report flagged rows in file-line order.

Split out of ``validate`` with behaviour unchanged; the format-specific checks build on it
(checks_stopping, checks_sequences, checks_contests, checks_lottery).
"""

from __future__ import annotations

import difflib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .report import ProblemCollector, suggest_label


@dataclass
class Column:
    """A checked column: values (float array, label codes or raw keys) and a validity mask."""

    values: np.ndarray
    ok: np.ndarray


class Checker:
    """Column-level checks on one raw frame; remembers typed columns for the clean frame."""

    def __init__(self, frame: pd.DataFrame, collector: ProblemCollector) -> None:
        self.frame = frame
        self.collector = collector
        self.lines = frame.index.to_numpy(dtype=np.int64) + 2
        self.n = len(frame)
        self.typed: dict[str, object] = {}

    def has(self, name: str) -> bool:
        return name in self.frame.columns

    def require(self, names: Sequence[str]) -> None:
        present = [str(c) for c in self.frame.columns]
        for name in names:
            if name not in present:
                self.missing_column(name, present)

    def missing_column(self, name: str, present: Sequence[str]) -> None:
        lowered = {p.lower().strip(): p for p in present}
        near = lowered.get(name.lower()) or next(
            iter(difflib.get_close_matches(name, present, n=1, cutoff=0.75)), None
        )
        hint = f"did you mean {near!r}?" if near else ""
        self.collector.add(
            "missing_column", 1, name, "<no such column>", f"a column named '{name}'", hint
        )

    def empty_mask(self, series: pd.Series) -> np.ndarray:
        """Missing or blank (whitespace-only text) cells; text is checked once per
        distinct value."""
        if isinstance(series.dtype, pd.CategoricalDtype):
            codes = series.cat.codes.to_numpy()
            blank = blank_labels(series.cat.categories)
            return (codes < 0) | blank_at(codes, blank)
        if series.dtype != object:
            return series.isna().to_numpy()
        codes, uniques = pd.factorize(series)
        blank = blank_labels(uniques)
        return (codes < 0) | blank_at(codes, blank)

    def numeric(
        self,
        name: str,
        required: bool,
        expected: str,
        integer: bool = False,
        bounds: tuple[float, float, bool, bool] | None = None,
        range_kind: str = "value_range",
    ) -> Column | None:
        """A numeric column as float64; reports wrong types, empties (when required), non
        integers (when ``integer``) and values outside ``bounds`` = (lo, hi, lo_open,
        hi_open)."""
        if not self.has(name):
            return None
        series = self.frame[name]
        if pd.api.types.is_numeric_dtype(series.dtype) or pd.api.types.is_bool_dtype(series.dtype):
            values = series.to_numpy(dtype=np.float64, na_value=np.nan)
            empty = np.isnan(values)
            wrong = np.zeros(self.n, dtype=bool)
        else:
            converted = pd.to_numeric(series, errors="coerce")
            values = converted.to_numpy(dtype=np.float64, na_value=np.nan)
            empty = self.empty_mask(series)
            wrong = np.isnan(values) & ~empty
        if wrong.any():
            idx = np.flatnonzero(wrong)
            self.collector.add_rows(
                "wrong_type", self.lines[idx], name, series.to_numpy()[idx], expected
            )
        if required and empty.any():
            idx = np.flatnonzero(empty)
            self.collector.add_rows(
                "missing_value", self.lines[idx], name, np.full(len(idx), np.nan), expected
            )
        ok = ~np.isnan(values)
        if integer:
            fractional = ok & (np.isinf(values) | (np.floor(values) != values))
            if fractional.any():
                idx = np.flatnonzero(fractional)
                self.collector.add_rows("wrong_type", self.lines[idx], name, values[idx], expected)
            ok &= ~fractional
        if bounds is not None:
            lo, hi, lo_open, hi_open = bounds
            with np.errstate(invalid="ignore"):
                below = values <= lo if lo_open else values < lo
                above = values >= hi if hi_open else values > hi
            outside = ok & (below | above | np.isinf(values))
            if outside.any():
                idx = np.flatnonzero(outside)
                self.collector.add_rows(range_kind, self.lines[idx], name, values[idx], expected)
            ok &= ~outside
        self.typed[name] = values
        return Column(values, ok)

    def labels(
        self, name: str, allowed: Sequence[str], required: bool, expected: str
    ) -> Column | None:
        """A label column as integer codes into ``allowed`` (-1 = empty or unknown)."""
        if not self.has(name):
            return None
        series = self.frame[name]
        categorical = pd.Categorical(series, categories=list(allowed))
        codes = np.asarray(categorical.codes, dtype=np.int64)
        unknown = codes < 0
        empty = np.zeros(self.n, dtype=bool)
        if unknown.any():
            idx = np.flatnonzero(unknown)
            empty[idx] = self.empty_mask(series.iloc[idx])
            bad = np.flatnonzero(unknown & ~empty)
            if len(bad):
                raw = series.to_numpy()[bad]
                shown = self.collector.max_per_kind
                hints = label_suggestions(raw[:shown], allowed) + [""] * max(len(raw) - shown, 0)
                self.collector.add_rows(
                    "unknown_label", self.lines[bad], name, raw, expected, hints
                )
            if required and empty.any():
                idx = np.flatnonzero(empty)
                self.collector.add_rows(
                    "missing_value", self.lines[idx], name, np.full(len(idx), np.nan), expected
                )
        self.typed[name] = categorical
        return Column(codes, codes >= 0)

    def key(self, name: str, expected: str) -> Column | None:
        """An identifier column (any non-empty value) as integer codes (-1 = empty)."""
        if not self.has(name):
            return None
        codes, uniques = pd.factorize(self.frame[name])
        blank = blank_labels(uniques)
        empty = (codes < 0) | blank_at(codes, blank)
        if empty.any():
            idx = np.flatnonzero(empty)
            self.collector.add_rows(
                "missing_value", self.lines[idx], name, np.full(len(idx), np.nan), expected
            )
        codes = np.where(empty, -1, codes)
        return Column(codes.astype(np.int64), ~empty)

    def clean_frame(self, integer_columns: Sequence[str]) -> pd.DataFrame:
        """The frame with checked columns replaced by their typed values (columns whose
        type is already right are kept as they are)."""
        frame = self.frame.copy(deep=False)
        for name, value in self.typed.items():
            current = frame[name].dtype
            if name in integer_columns:
                if current != np.int64:
                    frame[name] = np.asarray(value, dtype=np.float64).astype(np.int64)
            elif isinstance(value, pd.Categorical):
                if not (
                    isinstance(current, pd.CategoricalDtype)
                    and list(current.categories) == list(value.categories)
                ):
                    frame[name] = value
            elif current != np.float64:
                frame[name] = value
        return frame


def blank_at(codes: np.ndarray, blank: np.ndarray) -> np.ndarray:
    """blank[codes] with code -1 (missing) mapped to False."""
    return np.append(blank, False)[codes]


def blank_labels(uniques: Any) -> np.ndarray:
    """Per distinct value: is it whitespace-only text?"""
    return np.array([isinstance(u, str) and not u.strip() for u in uniques], dtype=bool)


def label_suggestions(raw: np.ndarray, allowed: Sequence[str]) -> list[str]:
    cache: dict[str, str] = {}
    hints = []
    for value in raw:
        text = str(value)
        if text not in cache:
            cache[text] = suggest_label(text, allowed)
        hints.append(cache[text])
    return hints


def quoted_labels(labels: Sequence[str]) -> str:
    return " or ".join(f"'{x}'" for x in labels)


def factorize_optional(series: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    codes, uniques = pd.factorize(series)
    blank = blank_labels(uniques)
    codes = np.where(blank_at(codes, blank), -1, codes)
    return codes.astype(np.int64), codes >= 0


def sort_rows(rows: np.ndarray, *keys: np.ndarray) -> np.ndarray:
    """``rows`` ordered by the keys (first key most significant); files are usually sorted
    already, which is checked in one pass before sorting."""
    columns = [k[rows] for k in keys]
    ordered = np.ones(max(len(rows) - 1, 0), dtype=bool)
    tied = np.ones(max(len(rows) - 1, 0), dtype=bool)
    for column in columns:
        ordered &= ~tied | (column[1:] >= column[:-1])
        tied &= column[1:] == column[:-1]
    if bool(ordered.all()):
        return rows
    return rows[np.lexsort(columns[::-1])]


def add_sorted(
    ch: Checker,
    kind: str,
    flags: np.ndarray,
    order: np.ndarray,
    column: str,
    values: np.ndarray | str,
    expected_at: Callable[[int], str],
) -> None:
    """Report rows flagged in sorted order, listed by file line; ``expected_at(i)`` builds
    the expectation for sorted position i (called only for the rows that are kept)."""
    positions = np.flatnonzero(flags)
    if len(positions) == 0:
        return
    rows = order[positions]
    by_line = np.argsort(rows, kind="stable")
    positions, rows = positions[by_line], rows[by_line]
    keep = max(ch.collector.max_per_kind - ch.collector.counts.get(kind, 0), 0)
    expected = [expected_at(i) for i in positions[:keep]]
    expected += [""] * (len(positions) - len(expected))
    shown = (
        np.full(len(positions), values, dtype=object)
        if isinstance(values, str)
        else (values[positions])
    )
    ch.collector.add_rows(kind, ch.lines[rows], column, shown, expected)
