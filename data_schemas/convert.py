"""Lossless conversion between trial-level and decision-level stopping data.

A trial with ``draws`` = d successful draws becomes d "draw"/"success" rows (steps 0..d-1)
followed by one closing row at step d: "draw"/"bust" when ``busted`` = 1, else "stop" with an
empty outcome; a censored trial (``censored`` = 1) has no closing row. Every other column is
per trial and is repeated on its rows; back at trial level it must be constant within a
trial. ``bank`` (= start + step * gain) is derived, so it is dropped at trial level and
re-created by default at decision level: decisions -> trials -> decisions gives the bank
back (pass ``bank=False`` to leave it out).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import columns as C
from .errors import StopwiseDataError, StopwiseInputError
from .validate import check_source

_DECISION_CORE = ("subject", "trial", "step", "action", "outcome", "bank")
_TRIAL_CORE = ("subject", "trial", "draws", "busted", C.CENSORED)


def trials_to_decisions(
    trials: pd.DataFrame, bank: bool = True, validate: bool = True
) -> pd.DataFrame:
    """Expand trial-level rows into decision rows (rows of a trial in step order, trials in
    input order); ``bank`` (default) adds the column bank = start + step * gain."""
    if validate:
        _require_valid(trials, C.TRIALS)
    trials = trials.reset_index(drop=True)
    draws = pd.to_numeric(trials["draws"]).to_numpy(dtype=np.int64)
    busted = pd.to_numeric(trials["busted"]).to_numpy(dtype=np.int64) == 1
    censored = _censored(trials)
    n_rows = draws + 1 - censored.astype(np.int64)
    which = np.repeat(np.arange(len(trials)), n_rows)
    offsets = np.cumsum(n_rows) - n_rows
    step = np.arange(len(which), dtype=np.int64) - np.repeat(offsets, n_rows)
    last_draws = draws[which]
    closing = step == last_draws
    action = np.where(closing & ~busted[which], "stop", "draw").astype(object)
    outcome = np.where(closing, np.where(busted[which], "bust", ""), "success").astype(object)
    outcome[outcome == ""] = np.nan
    repeated = trials.take(which).reset_index(drop=True)
    out = {
        "subject": repeated["subject"].to_numpy(),
        "trial": repeated["trial"].to_numpy(),
        "step": step,
        "p_survive": repeated["p_survive"].to_numpy(),
        "gain": repeated["gain"].to_numpy(),
        "action": action,
        "outcome": outcome,
    }
    if bank:
        start = repeated["start"].to_numpy(np.float64) if "start" in repeated else 0.0
        out["bank"] = start + step * repeated["gain"].to_numpy(np.float64)
    skip = set(C.TRIAL_REQUIRED) | {C.CENSORED, "bank"}  # a bank varies within a trial
    for name in trials.columns:
        if name not in skip:
            out[name] = repeated[name].to_numpy()
    return pd.DataFrame(out)


def decisions_to_trials(decisions: pd.DataFrame, validate: bool = True) -> pd.DataFrame:
    """Collapse decision rows into one row per trial (trials in order of first appearance):
    draws = number of successful draws, busted = 1 if the trial ended in a bust, and
    ``censored`` (only when some trial ended without stop or bust)."""
    if validate:
        _require_valid(decisions, C.DECISIONS)
    decisions = decisions.reset_index(drop=True)
    trial_id = decisions.groupby(["subject", "trial"], sort=False, dropna=False).ngroup()
    trial_id = trial_id.to_numpy(dtype=np.int64)
    n_trials = int(trial_id.max()) + 1 if len(trial_id) else 0
    outcome = decisions["outcome"].astype(object).to_numpy()
    action = decisions["action"].astype(object).to_numpy()
    draws = np.bincount(trial_id, weights=outcome == "success", minlength=n_trials)
    busted = np.bincount(trial_id, weights=outcome == "bust", minlength=n_trials) > 0
    stopped = np.bincount(trial_id, weights=action == "stop", minlength=n_trials) > 0
    first_row = _first_rows(trial_id, n_trials)
    firsts = decisions.take(first_row).reset_index(drop=True)
    out = {
        "subject": firsts["subject"].to_numpy(),
        "trial": firsts["trial"].to_numpy(),
        "p_survive": firsts["p_survive"].to_numpy(),
        "gain": firsts["gain"].to_numpy(),
        "draws": draws.astype(np.int64),
        "busted": busted.astype(np.int64),
    }
    censored = ~busted & ~stopped
    if censored.any():
        out[C.CENSORED] = censored.astype(np.int64)
    skip = set(_DECISION_CORE) | {"p_survive", "gain"}
    for name in decisions.columns:
        if name in skip:
            continue
        _require_constant(decisions[name], trial_id, first_row, name)
        out[name] = firsts[name].to_numpy()
    return pd.DataFrame(out)


def _censored(trials: pd.DataFrame) -> np.ndarray:
    if C.CENSORED not in trials.columns:
        return np.zeros(len(trials), dtype=bool)
    return pd.to_numeric(trials[C.CENSORED]).fillna(0).to_numpy(dtype=np.int64) == 1


def _first_rows(trial_id: np.ndarray, n_trials: int) -> np.ndarray:
    """Row position of each trial's first row (the row with the smallest step would be the
    same for validated data, whose steps start at 0 and rise by one)."""
    first = np.full(n_trials, -1, dtype=np.int64)
    idx = np.arange(len(trial_id))[::-1]
    first[trial_id[idx]] = idx
    return first


def _require_constant(
    column: pd.Series, trial_id: np.ndarray, first_row: np.ndarray, name: str
) -> None:
    values = column.to_numpy()
    reference = values[first_row][trial_id]
    same = pd.isna(values) & pd.isna(reference)
    with np.errstate(invalid="ignore"):
        same |= values == reference
    if not bool(np.all(same)):
        row = int(np.flatnonzero(~same)[0])
        raise StopwiseInputError(
            f"column '{name}' changes inside a trial (row {row + 2} as in a CSV with a header: "
            f"{values[row]!r}, first row of that trial: {reference[row]!r}); trial-level data "
            "keep one value per trial, so this column cannot be converted without loss"
        )


def _require_valid(frame: pd.DataFrame, fmt: str) -> None:
    if not isinstance(frame, pd.DataFrame):
        raise StopwiseInputError(
            f"expected a pandas DataFrame of {fmt}-level data, got {type(frame).__name__}"
        )
    report, _ = check_source(frame, kind=fmt, allow_censored=True)
    if not report.ok:
        raise StopwiseDataError(
            f"cannot convert: the {fmt}-level data are not valid\n{report.format()}", report
        )
