"""Validate stopping and lottery data, reporting every problem at once.

All checks are vectorised over rows (sorting once by subject, trial, step); only the first
``max_per_kind`` problems of each kind become records, but all are counted. See
``report.KIND_TITLES`` for the kinds checked. The checks live in modules by kind: reading
and file checks (reading, checks_file, checks_structure), column types (checker), stopping
data (checks_stopping, checks_sequences, checks_contests), lottery choices (checks_lottery)
and size limits (checks_limits).
"""

from __future__ import annotations

import os

import pandas as pd

from . import columns as C
from .checker import Checker
from .checks_lottery import check_lottery
from .checks_stopping import check_decisions, check_trials
from .errors import StopwiseInputError
from .reading import read_table
from .report import ProblemCollector, ValidationReport

Source = str | os.PathLike[str] | pd.DataFrame


def validate(
    source: Source,
    kind: str | None = None,
    allow_censored: bool = False,
    max_per_kind: int = 20,
) -> ValidationReport:
    """Check a CSV/Parquet file or a DataFrame against its format (told from the columns, or
    forced by ``kind`` in {"stopping", "lottery", "decisions", "trials"}); every problem is
    reported at once. Trials that neither stop nor bust are errors unless
    ``allow_censored``."""
    report, _ = check_source(source, kind, allow_censored, max_per_kind)
    return report


def check_source(
    source: Source,
    kind: str | None = None,
    allow_censored: bool = False,
    max_per_kind: int = 20,
) -> tuple[ValidationReport, pd.DataFrame | None]:
    """Validate and, when clean, return the typed frame in its own format (else None)."""
    if kind not in (None, "stopping", "lottery", C.DECISIONS, C.TRIALS):
        raise StopwiseInputError(
            f"unknown data kind {kind!r}: expected 'stopping', 'lottery', 'decisions' or "
            "'trials' (or nothing, to tell it from the columns)"
        )
    if max_per_kind < 1:
        raise StopwiseInputError("max_per_kind must be at least 1")
    allow_censored = bool(allow_censored)
    raw = read_table(source)
    collector = ProblemCollector(raw.source, max_per_kind)
    if raw.frame is None:
        assert raw.failure is not None
        problem_kind, what, line = raw.failure
        expected = raw.failure_expected or (
            "a table with a header row" if problem_kind != "bad_row" else what
        )
        collector.add(
            problem_kind,
            line,
            raw.failure_column,
            f"<{what}>" if problem_kind != "bad_row" else "<malformed row>",
            expected,
        )
        return _report(raw.source, None, collector, 0), None
    frame = raw.frame
    fmt = _choose_format(frame, kind, collector)
    if fmt is None:
        return _report(raw.source, None, collector, len(frame)), None
    checker = Checker(frame, collector)
    if len(frame) == 0:
        collector.add(
            "empty_file", None, None, "<a header but no data rows>", "at least one data row"
        )
    if fmt == C.DECISIONS:
        clean, stats = check_decisions(checker, allow_censored)
    elif fmt == C.TRIALS:
        clean, stats = check_trials(checker, allow_censored)
    else:
        clean, stats = check_lottery(checker)
    report = _report(raw.source, fmt, collector, len(frame), stats if collector.ok else {})
    return report, (clean if collector.ok else None)


def _report(
    source: str,
    fmt: str | None,
    collector: ProblemCollector,
    n_rows: int,
    stats: dict | None = None,
) -> ValidationReport:
    problems = sorted(collector.problems, key=lambda p: p.line or 0)
    return ValidationReport(
        source, fmt, problems, dict(collector.counts), n_rows, collector.max_per_kind, stats or {}
    )


def _choose_format(
    frame: pd.DataFrame, kind: str | None, collector: ProblemCollector
) -> str | None:
    detected = C.detect_format(frame.columns)
    if kind in (C.DECISIONS, C.TRIALS):
        return kind
    if kind == "lottery":
        return C.LOTTERY
    if kind == "stopping":
        if detected == C.LOTTERY:
            collector.add(
                "wrong_format",
                1,
                None,
                "<lottery-choice columns>",
                "stopping data (decision or trial level) as requested",
            )
            return None
        return detected or C.DECISIONS
    if detected is None:
        have = ", ".join(map(str, frame.columns)) or "none"
        collector.add(
            "missing_column",
            1,
            None,
            f"<columns: {have}>",
            "the columns of one format: decision level ("
            + ", ".join(C.DECISION_REQUIRED)
            + "), trial level ("
            + ", ".join(C.TRIAL_REQUIRED)
            + ") or lottery ("
            + ", ".join(C.LOTTERY_REQUIRED)
            + ", a_x1, a_p1, b_x1, b_p1, ...)",
        )
    return detected
