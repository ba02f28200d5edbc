"""Trial sequences of decision-level data (rows sorted by subject, trial, step): steps
from 0 without gaps or duplicates, nothing after a stop or bust, unfinished trials, the bank
against start + step * gain, and design columns constant within a trial (an empty cell,
meaning the default, differs from a given value)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import columns as C
from .checker import Checker, Column, add_sorted
from .report import show_value

BANK_RTOL = 1e-6
BANK_ATOL = 1e-9


def check_config_changes(
    ch: Checker,
    cols: dict[str, Column | None],
    order: np.ndarray,
    first: np.ndarray,
    varying_p: np.ndarray | None = None,
) -> None:
    """Design columns must keep the value of the trial's first row (in step order);
    ``varying_p`` marks rows (pool trials) whose p_survive changes with the step."""
    for name in C.TRIAL_CONFIG:
        column = cols.get(name)
        if column is None:
            continue
        values = column.values[order]
        ok = column.ok[order]
        if name == "p_survive" and varying_p is not None:
            ok = ok & ~varying_p[order]
        empty = ch.empty_mask(ch.frame[name]).astype(bool)[order]  # empty = the default
        changed = (ok & ok[first] & (values != values[first])) | (empty != empty[first])
        if not changed.any():
            continue
        raw = ch.frame[name].to_numpy()
        add_sorted(
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


def in_trials_of(
    flags: np.ndarray, subject: np.ndarray, trial: np.ndarray, order: np.ndarray
) -> bool | np.ndarray:
    """For the rows in ``order``: does their trial also hold a flagged row (a row left out
    of the step checks)? False when nothing is flagged."""
    if not flags.any():
        return False
    flagged = pd.MultiIndex.from_arrays([subject[flags], trial[flags]])
    return pd.MultiIndex.from_arrays([subject[order], trial[order]]).isin(flagged)


def check_bank(ch: Checker, cols: dict[str, Column | None], step: Column, bank: Column) -> None:
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


def trial_starts(subject: np.ndarray, trial: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For rows sorted by (subject, trial, ...): the first-row-of-trial flags and, per row,
    the position of its trial's first row."""
    n = len(subject)
    new_trial = np.ones(n, dtype=bool)
    if n > 1:
        new_trial[1:] = (subject[1:] != subject[:-1]) | (trial[1:] != trial[:-1])
    starts = np.flatnonzero(new_trial)
    first = starts[np.cumsum(new_trial) - 1] if n else np.zeros(0, dtype=np.int64)
    return new_trial, first


def terminal_rows(
    action: Column | None,
    outcome: Column | None,
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


def check_steps(
    ch: Checker,
    step: np.ndarray,
    order: np.ndarray,
    new_trial: np.ndarray,
    terminal: np.ndarray,
    allow_censored: bool | np.ndarray,
    action: Column | None,
    outcome: Column | None,
    draw_code: int,
) -> None:
    """Duplicates, gaps, rows after the end and unfinished trials (rows sorted by step)."""
    n = len(order)
    if n == 0:
        return
    prev_step = np.r_[-1.0, step[:-1]]
    duplicate = ~new_trial & (step == prev_step)
    lines = ch.lines[order]
    add_sorted(
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
    add_sorted(
        ch,
        "step_gap",
        first_bad,
        order,
        "step",
        step,
        lambda i: "0 at the first decision of a trial",
    )
    gap = ~new_trial & ~duplicate & (step != prev_step + 1)
    add_sorted(
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
    first_end = first_true_per_trial(terminal, trial_id, len(starts))
    add_sorted(
        ch,
        "row_after_end",
        after_end,
        order,
        "step",
        step,
        lambda i: (
            f"nothing after the trial's "
            f"{end_word(ch, order[first_end[trial_id[i]]])} on line "
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
    add_sorted(
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


def end_word(ch: Checker, row: int) -> str:
    action = ch.frame["action"].to_numpy()[row] if ch.has("action") else ""
    return "stop" if action == "stop" else "bust"


def first_true_per_trial(flags: np.ndarray, trial_id: np.ndarray, n_trials: int) -> np.ndarray:
    first = np.full(n_trials, -1, dtype=np.int64)
    idx = np.flatnonzero(flags)[::-1]
    first[trial_id[idx]] = idx
    return first
