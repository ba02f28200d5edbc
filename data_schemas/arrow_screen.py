"""A fast path for clean decision-level Parquet parts: read a part (with its seams) as Arrow
arrays (``arrow_parts``), screen it with whole-column numpy checks and, when the screen finds
nothing, hand back the part's summary and key arrays without building a pandas frame.

The screen vouches for a part only when the full validator (``partitioned.check_part``, i.e.
``validate.check_source`` on the same rows) would find no problem there; it writes no
messages. A part it cannot vouch for gets ``None``, and the caller runs the full validator on
it, whose report names file, line, column and expectation as always. That covers a failing
check as well as anything the screen does not model: contest, pool, sequential or
trial-level columns; text in a numeric column; blank, missing or unknown labels; nested
cells; an index stored by pandas; seams whose keys mix types. So the messages stay the
validator's own, and a clean part costs one Parquet read and a few numpy passes.

A clean part, as the validator checks it (rows of each trial in step order):

- subject: an integer or a text label that is not whitespace-only, never missing;
- trial: an integer with |trial| < 2^53; step: an integer, 0 <= step <= MAX_STEPS_PER_TRIAL;
- 0 < p_survive < 1; 0 < gain < inf; start finite; 0 <= bust_keep <= 1 (no empties);
- action 'draw' or 'stop'; outcome 'success' or 'bust' after a draw and missing after a stop;
- bank, where given, within ``np.isclose(bank, start + step * gain, rtol=1e-6, atol=1e-9)``;
- each trial's rows contiguous with steps 0, 1, 2, ...; no (subject, trial) in two blocks;
  p_survive, gain, start and bust_keep constant within a trial; nothing after a stop or a
  bust, and the last row a stop or a bust unless censored trials are allowed.

The screen asks for more than the validator in one respect: rows must come trial by trial in
step order (the validator sorts them first). A part in another order is still valid; it is
merely left to the validator.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa

from . import columns as C
from .arrow_parts import batch_table, column_array, column_values, subject_codes, text_codes
from .checks_sequences import BANK_ATOL, BANK_RTOL
from .checks_stopping import EXACT_ID
from .limits import MAX_STEPS_PER_TRIAL
from .partitioned import PartCheck, check_part

NUMERIC_COLUMNS = ("trial", "step", "p_survive", "gain", "bank", "start", "bust_keep")
DESIGN_COLUMNS = ("p_survive", "gain", "start", "bust_keep")  # constant within a trial
OUTCOME_EMPTY = len(C.OUTCOMES)  # outcome code of a missing outcome (after a stop)
STOP = C.ACTIONS.index("stop")
BUST = C.OUTCOMES.index("bust")


@dataclass(frozen=True)
class KeyArrays:
    """The rows of a clean part as the count reduction reads them: per row the subject code
    (into ``subject_labels``), the design values (start and bust_keep 0 when absent), step,
    action code (into ``columns.ACTIONS``) and outcome code (into ``columns.OUTCOMES``, or
    ``OUTCOME_EMPTY``); ``trial_start`` marks each trial's first row."""

    subject_codes: np.ndarray
    subject_labels: np.ndarray
    p_survive: np.ndarray
    gain: np.ndarray
    start: np.ndarray
    bust_keep: np.ndarray
    step: np.ndarray
    action: np.ndarray
    outcome: np.ndarray
    trial_start: np.ndarray

    @property
    def n_rows(self) -> int:
        return len(self.step)


@dataclass(frozen=True)
class FastPart:
    """A part the screen vouches for: its check (no problem) and its key arrays."""

    check: PartCheck
    keys: KeyArrays


def whole_numbers(values: np.ndarray) -> np.ndarray | bool:
    """Finite values without a fractional part (NaN and inf fail); integer arrays pass."""
    if values.dtype.kind in "iu":
        return True
    with np.errstate(invalid="ignore"):
        return np.isfinite(values) & (np.floor(values) == values)


def values_in_range(numbers: dict[str, np.ndarray]) -> bool:
    """Every cell of the numeric fast columns as the validator's ``Checker.numeric`` accepts
    it (bounds and integer rules of checks_stopping; a NaN fails every comparison; integers
    below 2^53 compare alike as int64 and as the validator's float64)."""
    trial, step = numbers["trial"], numbers["step"]
    p, gain = numbers["p_survive"], numbers["gain"]
    with np.errstate(invalid="ignore"):
        checks = [
            whole_numbers(trial) & (trial > -EXACT_ID) & (trial < EXACT_ID),
            whole_numbers(step) & (step >= 0) & (step <= MAX_STEPS_PER_TRIAL),
            (p > 0.0) & (p < 1.0),
            (gain > 0.0) & np.isfinite(gain),
        ]
        if "start" in numbers:
            checks.append(np.isfinite(numbers["start"]))
        if "bust_keep" in numbers:
            checks.append((numbers["bust_keep"] >= 0.0) & (numbers["bust_keep"] <= 1.0))
    return all(bool(np.all(c)) for c in checks)


def trial_blocks(subject: np.ndarray, trial: np.ndarray) -> np.ndarray | None:
    """First-row-of-trial flags for rows that come trial by trial; None when a (subject,
    trial) key shows up in two separate blocks (the validator would merge them)."""
    new = np.ones(len(subject), dtype=bool)
    np.not_equal(subject[1:], subject[:-1], out=new[1:])
    new[1:] |= trial[1:] != trial[:-1]
    starts = np.flatnonzero(new)
    keys_s, keys_t = subject[starts], trial[starts]
    order = np.lexsort((keys_t, keys_s))
    s, t = keys_s[order], keys_t[order]
    if bool(((s[1:] == s[:-1]) & (t[1:] == t[:-1])).any()):
        return None
    return new


def sequences_clean(
    new: np.ndarray,
    numbers: dict[str, np.ndarray],
    action: np.ndarray,
    outcome: np.ndarray,
    allow_censored: bool,
) -> bool:
    """Steps 0, 1, 2, ... within each trial; design columns constant; labels consistent
    (an outcome after each draw, none after a stop); the trial ends at its last row."""
    step = numbers["step"]
    starts = new[1:]
    if not bool((step[new] == 0).all()) or not bool(((step[1:] - step[:-1] == 1) | starts).all()):
        return False
    for name in DESIGN_COLUMNS:
        values = numbers.get(name)
        if values is not None and not bool(((values[1:] == values[:-1]) | starts).all()):
            return False
    if bool((action < 0).any() or (outcome < 0).any()):
        return False
    stops = action == STOP
    if bool((stops != (outcome == OUTCOME_EMPTY)).any()):
        return False
    terminal = stops | (outcome == BUST)
    last = np.r_[starts, True]
    if bool((terminal & ~last).any()):
        return False
    return allow_censored or bool((terminal | ~last).all())


def bank_clean(numbers: dict[str, np.ndarray], start: np.ndarray) -> bool:
    """Where a bank is given: bank = start + step * gain within the validator's tolerance
    (``checks_sequences.check_bank``, the same float64 arithmetic)."""
    if "bank" not in numbers:
        return True
    bank = np.asarray(numbers["bank"], dtype=np.float64)
    step = np.asarray(numbers["step"], dtype=np.float64)
    expected = start + step * np.asarray(numbers["gain"], dtype=np.float64)
    usable = ~np.isnan(bank)
    close = np.isclose(bank, expected, rtol=BANK_RTOL, atol=BANK_ATOL)
    return not bool((usable & ~close).any())


def as_float(values: np.ndarray) -> np.ndarray:
    return np.asarray(values, dtype=np.float64)


def screen_table(table: pa.Table, allow_censored: bool) -> KeyArrays | None:
    """The key arrays of a batch when every condition of the module docstring holds."""
    subjects = subject_codes(column_array(table, "subject"))
    if subjects is None:
        return None
    numbers = {
        name: column_values(column_array(table, name))
        for name in NUMERIC_COLUMNS
        if name in table.column_names
    }
    if not values_in_range(numbers):
        return None
    action = text_codes(column_array(table, "action"), C.ACTIONS, -1)
    outcome = text_codes(column_array(table, "outcome"), C.OUTCOMES, OUTCOME_EMPTY)
    new = trial_blocks(subjects[0], numbers["trial"])
    if new is None or not sequences_clean(new, numbers, action, outcome, allow_censored):
        return None
    zeros = np.zeros(table.num_rows)
    start = as_float(numbers.get("start", zeros))
    if not bank_clean(numbers, start):
        return None
    return KeyArrays(
        subject_codes=subjects[0],
        subject_labels=subjects[1],
        p_survive=as_float(numbers["p_survive"]),
        gain=as_float(numbers["gain"]),
        start=start,
        bust_keep=as_float(numbers.get("bust_keep", zeros)),
        step=np.asarray(numbers["step"], dtype=np.int64),
        action=action,
        outcome=outcome,
        trial_start=new,
    )


def part_summary(keys: KeyArrays) -> PartCheck:
    """The check of a clean part as ``partitioned.check_part`` summarises it: rows, subjects
    seen, trials and the distinct p_survive and gain values."""
    used = np.bincount(keys.subject_codes, minlength=len(keys.subject_labels)) > 0
    firsts = np.flatnonzero(keys.trial_start)
    values = {
        name: set(pd.unique(getattr(keys, name)[firsts]).tolist()) for name in ("p_survive", "gain")
    }
    subjects = set(keys.subject_labels[used].tolist())
    return PartCheck([], {}, keys.n_rows, C.DECISIONS, subjects, len(firsts), values)


def screen_part(
    parts: Sequence[str], k: int, kind: str | None = None, allow_censored: bool = False
) -> FastPart | None:
    """Part k (with its seams) when the screen vouches for it (module docstring), else None:
    then the full validator must check it."""
    table = batch_table(parts, k, kind)
    if table is None:
        return None
    keys = screen_table(table, bool(allow_censored))
    if keys is None:
        return None
    return FastPart(part_summary(keys), keys)


def check_part_summary(
    parts: Sequence[str],
    index: int,
    kind: str | None = None,
    allow_censored: bool = False,
    max_per_kind: int = 20,
    fast: bool = True,
) -> PartCheck:
    """One task of a validation pass: part ``index`` (with its seams) screened on Arrow
    arrays when ``fast`` and the screen vouches for it, else checked by the full validator
    (every problem with file, line, column and expectation)."""
    if fast and max_per_kind >= 1:
        screened = screen_part(parts, index, kind, allow_censored)
        if screened is not None:
            return screened.check
    return check_part(parts, index, kind, allow_censored, max_per_kind)[0]
