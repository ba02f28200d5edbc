"""Validate stopping and lottery data, reporting every problem at once.

All checks are vectorised over rows (sorting once by subject, trial, step); only the first
``max_per_kind`` problems of each kind become records, but all are counted. See
``report.KIND_TITLES`` for the kinds checked.
"""

from __future__ import annotations

import difflib
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from . import columns as C
from .checks_limits import (
    decision_rows,
    report_outcome_indices_beyond_limit,
    report_steps_beyond_limit,
    report_too_many_decisions,
)
from .errors import StopwiseInputError
from .reading import read_table
from .report import ProblemCollector, ValidationReport, show_value, suggest_label

Source = str | os.PathLike[str] | pd.DataFrame
PROBABILITY_TOLERANCE = 1e-6
BANK_RTOL = 1e-6
BANK_ATOL = 1e-9
EXACT_ID = 2.0**53  # integer ids are compared as float64, exact below this magnitude


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
    checker = _Checker(frame, collector)
    if len(frame) == 0:
        collector.add(
            "empty_file", None, None, "<a header but no data rows>", "at least one data row"
        )
    if fmt == C.DECISIONS:
        clean, stats = _check_decisions(checker, allow_censored)
    elif fmt == C.TRIALS:
        clean, stats = _check_trials(checker, allow_censored)
    else:
        clean, stats = _check_lottery(checker)
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


@dataclass
class _Column:
    """A checked column: values (float array, label codes or raw keys) and a validity mask."""

    values: np.ndarray
    ok: np.ndarray


class _Checker:
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

    def _empty_mask(self, series: pd.Series) -> np.ndarray:
        """Missing or blank (whitespace-only text) cells; text is checked once per
        distinct value."""
        if isinstance(series.dtype, pd.CategoricalDtype):
            codes = series.cat.codes.to_numpy()
            blank = _blank_labels(series.cat.categories)
            return (codes < 0) | _blank_at(codes, blank)
        if series.dtype != object:
            return series.isna().to_numpy()
        codes, uniques = pd.factorize(series)
        blank = _blank_labels(uniques)
        return (codes < 0) | _blank_at(codes, blank)

    def numeric(
        self,
        name: str,
        required: bool,
        expected: str,
        integer: bool = False,
        bounds: tuple[float, float, bool, bool] | None = None,
        range_kind: str = "value_range",
    ) -> _Column | None:
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
            empty = self._empty_mask(series)
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
        return _Column(values, ok)

    def labels(
        self, name: str, allowed: Sequence[str], required: bool, expected: str
    ) -> _Column | None:
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
            empty[idx] = self._empty_mask(series.iloc[idx])
            bad = np.flatnonzero(unknown & ~empty)
            if len(bad):
                raw = series.to_numpy()[bad]
                shown = self.collector.max_per_kind
                hints = _suggestions(raw[:shown], allowed) + [""] * max(len(raw) - shown, 0)
                self.collector.add_rows(
                    "unknown_label", self.lines[bad], name, raw, expected, hints
                )
            if required and empty.any():
                idx = np.flatnonzero(empty)
                self.collector.add_rows(
                    "missing_value", self.lines[idx], name, np.full(len(idx), np.nan), expected
                )
        self.typed[name] = categorical
        return _Column(codes, codes >= 0)

    def key(self, name: str, expected: str) -> _Column | None:
        """An identifier column (any non-empty value) as integer codes (-1 = empty)."""
        if not self.has(name):
            return None
        codes, uniques = pd.factorize(self.frame[name])
        blank = _blank_labels(uniques)
        empty = (codes < 0) | _blank_at(codes, blank)
        if empty.any():
            idx = np.flatnonzero(empty)
            self.collector.add_rows(
                "missing_value", self.lines[idx], name, np.full(len(idx), np.nan), expected
            )
        codes = np.where(empty, -1, codes)
        return _Column(codes.astype(np.int64), ~empty)

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


def _blank_at(codes: np.ndarray, blank: np.ndarray) -> np.ndarray:
    """blank[codes] with code -1 (missing) mapped to False."""
    return np.append(blank, False)[codes]


def _blank_labels(uniques: Any) -> np.ndarray:
    """Per distinct value: is it whitespace-only text?"""
    return np.array([isinstance(u, str) and not u.strip() for u in uniques], dtype=bool)


def _suggestions(raw: np.ndarray, allowed: Sequence[str]) -> list[str]:
    cache: dict[str, str] = {}
    hints = []
    for value in raw:
        text = str(value)
        if text not in cache:
            cache[text] = suggest_label(text, allowed)
        hints.append(cache[text])
    return hints


def _quoted(labels: Sequence[str]) -> str:
    return " or ".join(f"'{x}'" for x in labels)


# ---------------------------------------------------------------------------------------
# stopping data: columns shared by both levels
# ---------------------------------------------------------------------------------------


def _check_design_columns(ch: _Checker) -> dict[str, _Column | None]:
    """Per-trial design columns (required p_survive and gain, optional start ... keep_bank)."""
    cols: dict[str, _Column | None] = {}
    cols["subject"] = ch.key("subject", "a participant id")
    cols["trial"] = ch.numeric(
        "trial",
        True,
        "an integer trial id below 2^53 = 9007199254740992 in magnitude",
        integer=True,
        bounds=(-EXACT_ID, EXACT_ID, True, True),
    )
    cols["p_survive"] = ch.numeric(
        "p_survive",
        True,
        "a probability strictly between 0 and 1",
        bounds=(0.0, 1.0, True, True),
        range_kind="p_survive_range",
    )
    cols["gain"] = ch.numeric(
        "gain",
        True,
        "a finite number > 0",
        bounds=(0.0, np.inf, True, False),
        range_kind="gain_range",
    )
    cols["start"] = ch.numeric(
        "start",
        False,
        "a finite number (the bank at step 0)",
        bounds=(-np.inf, np.inf, False, False),
    )
    cols["bust_keep"] = ch.numeric(
        "bust_keep", False, "a share between 0 and 1", bounds=(0.0, 1.0, False, False)
    )
    cols["task"] = ch.labels("task", C.TASKS, False, _quoted(C.TASKS))
    # a group may be empty on solo rows, so emptiness is checked with the contest rules
    cols["group"] = _Column(*_factorize_optional(ch.frame["group"])) if ch.has("group") else None
    cols["n_players"] = ch.numeric(
        "n_players", False, "an integer >= 1", integer=True, bounds=(1.0, np.inf, False, False)
    )
    cols["prize"] = ch.numeric(
        "prize", False, "a finite number >= 0", bounds=(0.0, np.inf, False, False)
    )
    cols["keep_bank"] = ch.numeric(
        "keep_bank", False, "0 or 1", integer=True, bounds=(0.0, 1.0, False, False)
    )
    return cols


def _factorize_optional(series: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    codes, uniques = pd.factorize(series)
    blank = _blank_labels(uniques)
    codes = np.where(_blank_at(codes, blank), -1, codes)
    return codes.astype(np.int64), codes >= 0


def _contest_rows(ch: _Checker, cols: dict[str, _Column | None]) -> np.ndarray:
    """Rows of contest trials: task 'contest', or (without a task column) n_players > 1."""
    task = cols.get("task")
    if task is not None:
        return task.values == C.TASKS.index("contest")
    n_players = cols.get("n_players")
    if n_players is not None:
        with np.errstate(invalid="ignore"):
            return n_players.values > 1
    return np.zeros(ch.n, dtype=bool)


def _check_contest(
    ch: _Checker, cols: dict[str, _Column | None], subject: np.ndarray, contest: np.ndarray
) -> None:
    """Contest rows need group, n_players and prize; each group has n_players subjects."""
    if not contest.any():
        return
    rows = np.flatnonzero(contest)
    for name in C.CONTEST_REQUIRED:
        column = cols.get(name)
        if column is None:
            ch.collector.add(
                "contest_fields",
                int(ch.lines[rows[0]]),
                name,
                "<no such column>",
                f"a '{name}' column giving each contest row its {name.replace('_', ' ')} "
                f"({len(rows)} contest rows)",
            )
            continue
        empty = rows[~column.ok[rows]]
        raw_empty = (
            empty[np.isnan(np.asarray(column.values[empty], dtype=np.float64))]
            if (name != "group")
            else empty
        )
        if len(raw_empty):
            ch.collector.add_rows(
                "contest_fields",
                ch.lines[raw_empty],
                name,
                np.full(len(raw_empty), np.nan),
                f"a {name.replace('_', ' ')} on every contest row",
            )
    group, n_players = cols.get("group"), cols.get("n_players")
    if group is None or n_players is None:
        return
    usable = rows[group.ok[rows] & n_players.ok[rows] & (subject[rows] >= 0)]
    if len(usable) == 0:
        return
    table = pd.DataFrame(
        {
            "group": group.values[usable],
            "subject": subject[usable],
            "n_players": n_players.values[usable],
            "line": ch.lines[usable],
        }
    )
    per_group = table.groupby("group", sort=False).agg(
        subjects=("subject", "nunique"),
        n_min=("n_players", "min"),
        n_max=("n_players", "max"),
        line=("line", "min"),
    )
    bad = per_group[(per_group.subjects != per_group.n_min) | (per_group.n_min != per_group.n_max)]
    labels = ch.frame["group"].to_numpy()
    first_row = table.groupby("group", sort=False)["line"].idxmin()
    for code, row in bad.sort_values("line").iterrows():
        label = labels[usable[first_row[code]]]
        if row.n_min != row.n_max:
            expected = (
                f"one n_players value per group (group {show_value(label)} has "
                f"{int(row.n_min)} and {int(row.n_max)})"
            )
        else:
            expected = f"{int(row.n_min)} players in group {show_value(label)}, as n_players says"
        ch.collector.add(
            "group_size",
            int(row.line),
            "group",
            f"<{int(row.subjects)} subject(s) in the group>",
            expected,
        )


def _config_changes(
    ch: _Checker, cols: dict[str, _Column | None], order: np.ndarray, first: np.ndarray
) -> None:
    """Design columns must keep the value of the trial's first row (in step order)."""
    for name in C.TRIAL_CONFIG:
        column = cols.get(name)
        if column is None:
            continue
        values = column.values[order]
        ok = column.ok[order]
        empty = ch._empty_mask(ch.frame[name]).astype(bool)[order]  # empty = the default
        changed = (ok & ok[first] & (values != values[first])) | (empty != empty[first])
        if not changed.any():
            continue
        raw = ch.frame[name].to_numpy()
        _add_sorted(
            ch,
            "config_changes",
            changed,
            order,
            name,
            raw[order],
            lambda i, raw=raw: (
                "the value of the trial's first row (line "
                f"{ch.lines[order[first[i]]]}): {show_value(raw[order[first[i]]])}"
            ),
        )


# ---------------------------------------------------------------------------------------
# decision level
# ---------------------------------------------------------------------------------------


def _check_decisions(ch: _Checker, allow_censored: bool) -> tuple[pd.DataFrame, dict]:
    ch.require(C.DECISION_REQUIRED)
    cols = _check_design_columns(ch)
    step = ch.numeric(
        "step",
        True,
        "an integer >= 0 (successful draws so far)",
        integer=True,
        bounds=(0.0, np.inf, False, False),
        range_kind="step_negative",
    )
    action = ch.labels("action", C.ACTIONS, True, _quoted(C.ACTIONS))
    outcome = ch.labels(
        "outcome", C.OUTCOMES, False, f"{_quoted(C.OUTCOMES)} after a draw, empty after a stop"
    )
    bank = ch.numeric("bank", False, "a number (the bank before the decision)")
    if step is not None:
        report_steps_beyond_limit(ch.collector, ch.lines, "step", step.values, step.ok)
    draw_code, stop_code = C.ACTIONS.index("draw"), C.ACTIONS.index("stop")
    bust_code = C.OUTCOMES.index("bust")
    if action is not None and ch.has("outcome"):
        outcome_given = ~ch._empty_mask(ch.frame["outcome"])
        after_stop = np.flatnonzero((action.values == stop_code) & outcome_given)
        ch.collector.add_rows(
            "outcome_after_stop",
            ch.lines[after_stop],
            "outcome",
            ch.frame["outcome"].to_numpy()[after_stop],
            "an empty outcome after 'stop'",
        )
        no_outcome = np.flatnonzero((action.values == draw_code) & ~outcome_given)
        ch.collector.add_rows(
            "outcome_missing",
            ch.lines[no_outcome],
            "outcome",
            np.full(len(no_outcome), np.nan),
            f"{_quoted(C.OUTCOMES)} after a draw",
        )
    if bank is not None and step is not None:
        _check_bank(ch, cols, step, bank)
    subject, trial = cols["subject"], cols["trial"]
    stats: dict = {}
    if subject is not None and trial is not None and step is not None:
        valid = subject.ok & trial.ok & step.ok
        rows = np.flatnonzero(valid)
        order = _sort_rows(rows, subject.values, trial.values, step.values)
        new_trial, first = _trial_starts(subject.values[order], trial.values[order])
        terminal = _terminal(action, outcome, stop_code, bust_code, order)
        hidden = subject.ok & trial.ok & ~step.ok
        uncertain = _in_trials_of(hidden, subject.values, trial.values, order)
        _check_steps(
            ch,
            step.values[order],
            order,
            new_trial,
            terminal,
            allow_censored or uncertain,
            action,
            outcome,
            draw_code,
        )
        _config_changes(ch, cols, order, first)
        contest = _contest_rows(ch, cols)
        _check_contest(ch, cols, subject.values, contest)
        stats = _stopping_stats(ch, cols, subject.values, int(new_trial.sum()))
    clean = ch.clean_frame(("trial", "step", "n_players", "keep_bank")) if ch.collector.ok else None
    return clean, stats


def _in_trials_of(
    flags: np.ndarray, subject: np.ndarray, trial: np.ndarray, order: np.ndarray
) -> bool | np.ndarray:
    """For the rows in ``order``: does their trial also hold a flagged row (a row left out
    of the step checks)? False when nothing is flagged."""
    if not flags.any():
        return False
    flagged = pd.MultiIndex.from_arrays([subject[flags], trial[flags]])
    return pd.MultiIndex.from_arrays([subject[order], trial[order]]).isin(flagged)


def _sort_rows(rows: np.ndarray, *keys: np.ndarray) -> np.ndarray:
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


def _check_bank(
    ch: _Checker, cols: dict[str, _Column | None], step: _Column, bank: _Column
) -> None:
    gain, start = cols["gain"], cols["start"]
    if gain is None:
        return
    start_values = start.values if start is not None else np.zeros(ch.n)
    expected = start_values + step.values * gain.values
    usable = bank.ok & step.ok & gain.ok & ~np.isnan(start_values)
    mismatch = usable & ~np.isclose(bank.values, expected, rtol=BANK_RTOL, atol=BANK_ATOL)
    idx = np.flatnonzero(mismatch)
    ch.collector.add_rows(
        "bank_mismatch",
        ch.lines[idx],
        "bank",
        bank.values[idx],
        [
            f"start + step * gain = {show_value(expected[i])}"
            for i in idx[: ch.collector.max_per_kind]
        ]
        + [""] * max(len(idx) - ch.collector.max_per_kind, 0),
    )


def _trial_starts(subject: np.ndarray, trial: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For rows sorted by (subject, trial, ...): the first-row-of-trial flags and, per row,
    the position of its trial's first row."""
    n = len(subject)
    new_trial = np.ones(n, dtype=bool)
    if n > 1:
        new_trial[1:] = (subject[1:] != subject[:-1]) | (trial[1:] != trial[:-1])
    starts = np.flatnonzero(new_trial)
    first = starts[np.cumsum(new_trial) - 1] if n else np.zeros(0, dtype=np.int64)
    return new_trial, first


def _terminal(
    action: _Column | None,
    outcome: _Column | None,
    stop_code: int,
    bust_code: int,
    order: np.ndarray,
) -> np.ndarray:
    terminal = np.zeros(len(order), dtype=bool)
    if action is not None:
        terminal |= action.values[order] == stop_code
    if outcome is not None:
        terminal |= outcome.values[order] == bust_code
    return terminal


def _check_steps(
    ch: _Checker,
    step: np.ndarray,
    order: np.ndarray,
    new_trial: np.ndarray,
    terminal: np.ndarray,
    allow_censored: bool | np.ndarray,
    action: _Column | None,
    outcome: _Column | None,
    draw_code: int,
) -> None:
    """Duplicates, gaps, rows after the end and unfinished trials (rows sorted by step)."""
    n = len(order)
    if n == 0:
        return
    prev_step = np.r_[-1.0, step[:-1]]
    duplicate = ~new_trial & (step == prev_step)
    lines = ch.lines[order]
    _add_sorted(
        ch,
        "duplicate_row",
        duplicate,
        order,
        "step",
        step,
        lambda i: (
            f"one row per (subject, trial, step); line {lines[i - 1]} has the "
            "same subject, trial and step"
        ),
    )
    first_bad = new_trial & (step != 0)
    _add_sorted(
        ch,
        "step_gap",
        first_bad,
        order,
        "step",
        step,
        lambda i: "0 at the first decision of a trial",
    )
    gap = ~new_trial & ~duplicate & (step != prev_step + 1)
    _add_sorted(
        ch,
        "step_gap",
        gap,
        order,
        "step",
        step,
        lambda i: (
            f"step {int(prev_step[i]) + 1} after step {int(prev_step[i])} (line {lines[i - 1]})"
        ),
    )
    trial_id = np.cumsum(new_trial) - 1
    counted = np.cumsum(terminal)
    starts = np.flatnonzero(new_trial)
    before_trial = (counted - terminal)[starts][trial_id]
    ended_before = (counted - terminal - before_trial) > 0
    after_end = ended_before & ~duplicate
    first_end = _first_true_per_trial(terminal, trial_id, len(starts))
    _add_sorted(
        ch,
        "row_after_end",
        after_end,
        order,
        "step",
        step,
        lambda i: (
            f"nothing after the trial's "
            f"{_end_word(ch, order[first_end[trial_id[i]]])} on line "
            f"{lines[first_end[trial_id[i]]]}"
        ),
    )
    if allow_censored is True or action is None or outcome is None:
        return
    excused = np.zeros(n, dtype=bool) if allow_censored is False else allow_censored
    last = np.r_[new_trial[1:], True]
    never_ended = (counted[last] - (counted - terminal)[starts]) == 0
    last_rows = np.flatnonzero(last)
    clean_draw = (action.values[order[last_rows]] == draw_code) & (
        outcome.values[order[last_rows]] == C.OUTCOMES.index("success")
    )
    unfinished = np.zeros(n, dtype=bool)
    unfinished[last_rows[never_ended & clean_draw & ~excused[last_rows]]] = True
    _add_sorted(
        ch,
        "unfinished_trial",
        unfinished,
        order,
        "action",
        "draw/success",
        lambda i: (
            "the trial to end with 'stop' or a 'bust' (pass "
            "allow_censored=True or --allow-censored to keep unfinished trials as "
            "censored)"
        ),
    )


def _end_word(ch: _Checker, row: int) -> str:
    action = ch.frame["action"].to_numpy()[row] if ch.has("action") else ""
    return "stop" if action == "stop" else "bust"


def _first_true_per_trial(flags: np.ndarray, trial_id: np.ndarray, n_trials: int) -> np.ndarray:
    first = np.full(n_trials, -1, dtype=np.int64)
    idx = np.flatnonzero(flags)[::-1]
    first[trial_id[idx]] = idx
    return first


def _add_sorted(
    ch: _Checker,
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


def _distinct(values: np.ndarray, limit: int = 12) -> list[float]:
    return sorted(float(v) for v in pd.unique(values))[:limit]


def _stopping_stats(
    ch: _Checker, cols: dict[str, _Column | None], subject: np.ndarray, n_trials: int
) -> dict:
    stats: dict = {"subjects": int(subject.max()) + 1 if len(subject) else 0, "trials": n_trials}
    p = cols.get("p_survive")
    if p is not None:
        stats["p_survive values"] = _distinct(p.values[p.ok])
    g = cols.get("gain")
    if g is not None:
        stats["gain values"] = _distinct(g.values[g.ok])
    task = cols.get("task")
    if task is not None:
        counts = np.bincount(task.values[task.ok], minlength=len(C.TASKS))
        stats["rows by task"] = [f"{name} {int(c)}" for name, c in zip(C.TASKS, counts)]
    known = (
        set(C.DECISION_REQUIRED) | set(C.TRIAL_REQUIRED) | set(C.OPTIONAL_STOPPING) | {C.CENSORED}
    )
    extra = [str(c) for c in ch.frame.columns if c not in known]
    if extra:
        stats["other columns (covariates)"] = extra
    return stats


# ---------------------------------------------------------------------------------------
# trial level
# ---------------------------------------------------------------------------------------


def _check_trials(ch: _Checker, allow_censored: bool) -> tuple[pd.DataFrame, dict]:
    ch.require(C.TRIAL_REQUIRED)
    cols = _check_design_columns(ch)
    draws = ch.numeric(
        "draws",
        True,
        "an integer >= 0 (successful draws)",
        integer=True,
        bounds=(0.0, np.inf, False, False),
    )
    busted = ch.numeric(
        "busted",
        True,
        "0 or 1 (1 = the trial ended in a bust)",
        integer=True,
        bounds=(0.0, 1.0, False, False),
    )
    censored = ch.numeric(
        C.CENSORED,
        False,
        "0 or 1 (1 = the trial ended unfinished)",
        integer=True,
        bounds=(0.0, 1.0, False, False),
    )
    if draws is not None:
        report_steps_beyond_limit(ch.collector, ch.lines, "draws", draws.values, draws.ok)
        flags = censored.values if censored is not None else None
        report_too_many_decisions(ch.collector, decision_rows(draws.values, draws.ok, flags))
    if censored is not None:
        flagged = censored.ok & (censored.values == 1)
        if not allow_censored:
            idx = np.flatnonzero(flagged)
            ch.collector.add_rows(
                "unfinished_trial",
                ch.lines[idx],
                C.CENSORED,
                censored.values[idx],
                "0: censored trials are refused unless allow_censored=True (--allow-censored)",
            )
        draws = ch.frame["draws"] if ch.has("draws") else None
        if draws is not None:
            counts = pd.to_numeric(draws, errors="coerce").to_numpy(dtype=np.float64)
            none = np.flatnonzero(flagged & (counts == 0))
            ch.collector.add_rows(
                "value_range",
                ch.lines[none],
                "draws",
                counts[none],
                "at least 1 draw in a censored trial (a trial without any decision cannot be kept)",
            )
        if busted is not None:
            both = np.flatnonzero(flagged & busted.ok & (busted.values == 1))
            ch.collector.add_rows(
                "value_range",
                ch.lines[both],
                C.CENSORED,
                censored.values[both],
                "0 on a trial that busted",
            )
    subject, trial = cols["subject"], cols["trial"]
    stats: dict = {}
    if subject is not None and trial is not None:
        rows = np.flatnonzero(subject.ok & trial.ok)
        order = _sort_rows(rows, subject.values, trial.values)
        s, t = subject.values[order], trial.values[order]
        dup = np.zeros(len(order), dtype=bool)
        dup[1:] = (s[1:] == s[:-1]) & (t[1:] == t[:-1])
        lines = ch.lines[order]
        _add_sorted(
            ch,
            "duplicate_row",
            dup,
            order,
            "trial",
            t,
            lambda i: (
                f"one row per (subject, trial); line {lines[i - 1]} has the same subject and trial"
            ),
        )
        contest = _contest_rows(ch, cols)
        _check_contest(ch, cols, subject.values, contest)
        stats = _stopping_stats(ch, cols, subject.values, len(order))
    integers = ("trial", "draws", "busted", "n_players", "keep_bank", C.CENSORED)
    clean = ch.clean_frame(integers) if ch.collector.ok else None
    return clean, stats


# ---------------------------------------------------------------------------------------
# lottery choices
# ---------------------------------------------------------------------------------------


def _check_lottery(ch: _Checker) -> tuple[pd.DataFrame, dict]:
    ch.require(C.LOTTERY_REQUIRED)
    subject = ch.key("subject", "a participant id")
    ch.key("item", "an item id")
    choice = ch.labels("choice", C.CHOICES, True, _quoted(C.CHOICES))
    too_wide = report_outcome_indices_beyond_limit(ch.collector, ch.frame.columns)
    indices = C.lottery_outcome_indices(c for c in ch.frame.columns if c not in too_wide)
    for option in ("a", "b"):
        wanted = indices[option] or [1]
        for k in wanted:
            for part in ("x", "p"):
                name = f"{option}_{part}{k}"
                if not ch.has(name):
                    ch.missing_column(name, [str(c) for c in ch.frame.columns])
        _check_option(ch, option, wanted)
    stats: dict = {}
    if subject is not None and choice is not None:
        stats = {
            "subjects": int(subject.values.max()) + 1 if ch.n else 0,
            "items": int(ch.frame["item"].nunique()) if ch.has("item") else 0,
            "share choosing B": float(np.mean(choice.values == 1)) if ch.n else 0.0,
        }
    return (ch.clean_frame(()) if ch.collector.ok else None), stats


def _check_option(ch: _Checker, option: str, indices: list[int]) -> None:
    """Outcomes need a value where their probability is positive; probabilities lie in
    [0, 1] and sum to 1 (within 1e-6) per option; an empty x/p pair is an unused slot."""
    total = np.zeros(ch.n)
    usable = np.ones(ch.n, dtype=bool)
    for k in indices:
        x = ch.numeric(
            f"{option}_x{k}",
            False,
            "a finite number (an outcome)",
            bounds=(-np.inf, np.inf, False, False),
        )
        p = ch.numeric(
            f"{option}_p{k}",
            False,
            "a probability between 0 and 1",
            bounds=(0.0, 1.0, False, False),
            range_kind="probability_range",
        )
        if x is None or p is None:
            usable[:] = False
            continue
        x_empty, p_empty = np.isnan(x.values), np.isnan(p.values)
        p_needed = np.flatnonzero(p_empty & ~x_empty)
        ch.collector.add_rows(
            "missing_value",
            ch.lines[p_needed],
            f"{option}_p{k}",
            np.full(len(p_needed), np.nan),
            "a probability for the outcome given beside it",
        )
        x_needed = np.flatnonzero(x_empty & p.ok & (p.values > 0))
        ch.collector.add_rows(
            "missing_value",
            ch.lines[x_needed],
            f"{option}_x{k}",
            np.full(len(x_needed), np.nan),
            "an outcome value where its probability is positive",
        )
        usable &= (p.ok | p_empty) & ~np.isin(np.arange(ch.n), p_needed)
        total += np.where(p.ok, p.values, 0.0)
    off = np.flatnonzero(usable & (np.abs(total - 1.0) > PROBABILITY_TOLERANCE))
    ch.collector.add_rows(
        "probability_sum",
        ch.lines[off],
        f"{option}_p*",
        total[off],
        f"the probabilities of option {option.upper()} to sum to 1 "
        f"(within {PROBABILITY_TOLERANCE:g})",
    )
