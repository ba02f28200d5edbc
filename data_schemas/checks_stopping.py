"""Stopping data at decision and trial level: the per-trial design columns, the entry
points ``check_decisions`` and ``check_trials`` (each returns the typed frame when clean and
the report's statistics), and the statistics themselves."""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import columns as C
from .checker import Checker, Column, add_sorted, factorize_optional, quoted_labels, sort_rows
from .checks_contests import check_contest, contest_rows
from .checks_limits import decision_rows, report_steps_beyond_limit, report_too_many_decisions
from .checks_pool import check_pool_columns, check_pool_rows, check_variant_contests, pool_rows
from .checks_sequences import (
    check_bank,
    check_config_changes,
    check_steps,
    in_trials_of,
    terminal_rows,
    trial_starts,
)
from .checks_sequential import SEQUENTIAL_COLUMNS, check_sequential

EXACT_ID = 2.0**53  # integer ids are compared as float64, exact below this magnitude


def check_design_columns(ch: Checker) -> dict[str, Column | None]:
    """Per-trial design columns (required p_survive and gain, optional start ... keep_bank)."""
    cols: dict[str, Column | None] = {}
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
        # 0 is allowed (and checked in checks_pool) only where a pool has no good item left
        bounds=(0.0, 1.0, not ch.has("pool_size"), True),
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
    cols["task"] = ch.labels("task", C.TASKS, False, quoted_labels(C.TASKS))
    # a group may be empty on solo rows, so emptiness is checked with the contest rules
    cols["group"] = Column(*factorize_optional(ch.frame["group"])) if ch.has("group") else None
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


def check_decisions(ch: Checker, allow_censored: bool) -> tuple[pd.DataFrame, dict]:
    ch.require(C.DECISION_REQUIRED)
    cols = check_design_columns(ch)
    step = ch.numeric(
        "step",
        True,
        "an integer >= 0 (successful draws so far)",
        integer=True,
        bounds=(0.0, np.inf, False, False),
        range_kind="step_negative",
    )
    action = ch.labels("action", C.ACTIONS, True, quoted_labels(C.ACTIONS))
    outcome = ch.labels(
        "outcome",
        C.OUTCOMES,
        False,
        f"{quoted_labels(C.OUTCOMES)} after a draw, empty after a stop",
    )
    bank = ch.numeric("bank", False, "a number (the bank before the decision)")
    cols.update(check_pool_columns(ch))
    check_pool_rows(ch, cols, step, action)
    if step is not None:
        report_steps_beyond_limit(ch.collector, ch.lines, "step", step.values, step.ok)
    draw_code, stop_code = C.ACTIONS.index("draw"), C.ACTIONS.index("stop")
    bust_code = C.OUTCOMES.index("bust")
    if action is not None and ch.has("outcome"):
        outcome_given = ~ch.empty_mask(ch.frame["outcome"])
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
            f"{quoted_labels(C.OUTCOMES)} after a draw",
        )
    if bank is not None and step is not None:
        check_bank(ch, cols, step, bank)
    subject, trial = cols["subject"], cols["trial"]
    stats: dict = {}
    if subject is not None and trial is not None and step is not None:
        valid = subject.ok & trial.ok & step.ok
        rows = np.flatnonzero(valid)
        order = sort_rows(rows, subject.values, trial.values, step.values)
        new_trial, first = trial_starts(subject.values[order], trial.values[order])
        terminal = terminal_rows(action, outcome, stop_code, bust_code, order)
        hidden = subject.ok & trial.ok & ~step.ok
        uncertain = in_trials_of(hidden, subject.values, trial.values, order)
        check_steps(
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
        check_config_changes(ch, cols, order, first, pool_rows(cols))
        contest = contest_rows(ch, cols)
        check_contest(ch, cols, subject.values, contest)
        check_variant_contests(ch, cols, contest)
        check_sequential(ch, cols, *_trial_keys(subject, trial), contest)
        stats = stopping_stats(ch, cols, subject.values, int(new_trial.sum()))
    integers = ("trial", "step", "n_players", "keep_bank", "pool_size", "pool_bad", "odds_known")
    clean = ch.clean_frame(integers) if ch.collector.ok else None
    return clean, stats


def _trial_keys(subject: Column, trial: Column) -> tuple[np.ndarray, np.ndarray]:
    """Subject and trial codes with -1 where the cell is invalid."""
    return (
        np.where(subject.ok, subject.values, -1),
        np.where(trial.ok, trial.values, -1),
    )


def distinct_values(values: np.ndarray, limit: int = 12) -> list[float]:
    return sorted(float(v) for v in pd.unique(values))[:limit]


def stopping_stats(
    ch: Checker, cols: dict[str, Column | None], subject: np.ndarray, n_trials: int
) -> dict:
    stats: dict = {"subjects": int(subject.max()) + 1 if len(subject) else 0, "trials": n_trials}
    p = cols.get("p_survive")
    if p is not None:
        stats["p_survive_values"] = distinct_values(p.values[p.ok])
    g = cols.get("gain")
    if g is not None:
        stats["gain_values"] = distinct_values(g.values[g.ok])
    task = cols.get("task")
    if task is not None:
        counts = np.bincount(task.values[task.ok], minlength=len(C.TASKS))
        stats["rows_by_task"] = {name: int(c) for name, c in zip(C.TASKS, counts)}
    known = (
        set(C.DECISION_REQUIRED)
        | set(C.TRIAL_REQUIRED)
        | set(C.OPTIONAL_STOPPING)
        | set(SEQUENTIAL_COLUMNS)
        | {C.CENSORED}
    )
    extra = [str(c) for c in ch.frame.columns if c not in known]
    if extra:
        stats["covariates"] = extra
    return stats


def check_trials(ch: Checker, allow_censored: bool) -> tuple[pd.DataFrame, dict]:
    ch.require(C.TRIAL_REQUIRED)
    cols = check_design_columns(ch)
    for name in C.POOL_COLUMNS:
        if ch.has(name):
            ch.collector.add(
                "wrong_format",
                1,
                name,
                name,
                "decision-level data (one row per decision) for draws from a pool: their "
                "p_survive is given per draw",
            )
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
        order = sort_rows(rows, subject.values, trial.values)
        s, t = subject.values[order], trial.values[order]
        dup = np.zeros(len(order), dtype=bool)
        dup[1:] = (s[1:] == s[:-1]) & (t[1:] == t[:-1])
        lines = ch.lines[order]
        add_sorted(
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
        contest = contest_rows(ch, cols)
        check_contest(ch, cols, subject.values, contest)
        check_sequential(ch, cols, *_trial_keys(subject, trial), contest)
        stats = stopping_stats(ch, cols, subject.values, len(order))
    integers = ("trial", "draws", "busted", "n_players", "keep_bank", C.CENSORED)
    clean = ch.clean_frame(integers) if ch.collector.ok else None
    return clean, stats
