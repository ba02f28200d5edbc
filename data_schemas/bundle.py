"""Build the immutable array bundles (StoppingData, LotteryData) from validated frames.

Row i of a bundle is row i of the frame. Subjects are numbered 0..n_subjects-1 in sorted
label order, trials 0..n_trials-1 sorted by (subject, trial id), and each distinct trial
configuration (p_survive, gain, start, bust_keep, contest, n_players, prize, keep_bank,
pool, odds told, what was seen before an untold trial: data_schemas.streams, and a sequential
mover's order and state: data_schemas.sequential_state) gets one
entry of the condition table; the p_survive of a pool trial is its first draw's chance. Solo trials have n_players 1, prize 0, keep_bank 1.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from . import columns as C
from .arrays import LotteryData, StoppingData
from .errors import StopwiseInputError
from .sequential_state import sequential_states
from .streams import seen_before, trial_outcome_counts


def to_stopping_data(
    frame: pd.DataFrame, covariates: Sequence[str] = (), horizon: int | None = None
) -> StoppingData:
    """Decision-level frame -> StoppingData; ``horizon`` defaults to max(step) + 1."""
    _require_columns(frame, C.DECISION_REQUIRED)
    if isinstance(covariates, str):
        covariates = (covariates,)
    subject, subject_labels = _codes(frame["subject"])
    trial_ids = frame["trial"].to_numpy()
    trial, trial_labels = _trial_index(subject, trial_ids, subject_labels)
    step = frame["step"].to_numpy(dtype=np.int64)
    max_step = int(step.max()) if len(step) else 0
    if horizon is None:
        horizon = max_step + 1
    elif horizon < max_step + 1:
        raise StopwiseInputError(
            f"horizon {horizon} is too short: the data reach step {max_step}, so the horizon "
            f"must be at least {max_step + 1}"
        )
    contest = _contest_flags(frame)
    action = frame["action"].to_numpy(dtype=object)
    outcome = frame["outcome"].to_numpy(dtype=object)
    draw = (action == "draw").astype(np.float64)
    bust = (outcome == "bust").astype(np.float64)
    config = _trial_config(frame, contest)
    config[:, 11:13] = _seen_columns(config, subject, trial, draw, bust)
    config[:, 13:16] = sequential_states(frame, contest)
    cond, table = _condition_table(config, trial)
    group = _group_index(frame, contest)
    return StoppingData(
        subject=subject.astype(np.int32),
        trial=trial.astype(np.int32),
        step=step.astype(np.int32),
        draw=draw,
        bust=bust,
        cond=cond.astype(np.int32),
        group=group.astype(np.int32),
        **_condition_fields(table, sequential="order" in frame.columns),
        covariates=numeric_covariates(frame, covariates),
        horizon=int(horizon),
        subject_labels=subject_labels,
        trial_labels=trial_labels,
    )


_COND_ORDER = (
    "cond_p_survive",
    "cond_gain",
    "cond_start",
    "cond_bust_keep",
    "cond_contest",
    "cond_n_players",
    "cond_prize",
    "cond_keep_bank",
    "cond_pool_size",
    "cond_pool_bad",
    "cond_odds_known",
    "cond_seen_success",
    "cond_seen_fail",
    "cond_order",
    "cond_seen_best",
    "cond_seen_tied",
)


def _condition_fields(table: np.ndarray, sequential: bool) -> dict[str, np.ndarray | None]:
    """The condition table's columns by field name; without an ``order`` column the
    sequential fields are None (no sequential contests in the data)."""
    fields = {name: table[:, i].copy() for i, name in enumerate(_COND_ORDER)}
    if not sequential:
        fields.update(cond_order=None, cond_seen_best=None, cond_seen_tied=None)
    return fields


def _seen_columns(
    config: np.ndarray, subject: np.ndarray, trial: np.ndarray, draw: np.ndarray, bust: np.ndarray
) -> np.ndarray:
    """(n_obs, 2): per row, its trial's seen_success and seen_fail (data_schemas.streams);
    zeros when every trial's odds are told (``seen_before`` is 0 for told trials)."""
    n_trials = int(trial.max()) + 1 if len(trial) else 0
    if n_trials == 0 or not (config[:, 10] == 0.0).any():
        return np.zeros((len(trial), 2))
    first = np.full(n_trials, -1, dtype=np.int64)
    rows = np.arange(len(trial))[::-1]
    first[trial[rows]] = rows
    success, fail = trial_outcome_counts(trial, draw, bust, n_trials)
    untold = config[first, 10] == 0.0
    stream = pd.MultiIndex.from_arrays([subject[first], config[first, 0]]).factorize()[0]
    seen_s, seen_f = seen_before(stream, untold, success, fail)
    return np.stack([seen_s, seen_f], axis=1)[trial]


def to_lottery_data(frame: pd.DataFrame, covariates: Sequence[str] = ()) -> LotteryData:
    """Lottery frame -> LotteryData; outcomes padded to the widest option with p = 0 and the
    option's first outcome value."""
    _require_columns(frame, C.LOTTERY_REQUIRED)
    if isinstance(covariates, str):
        covariates = (covariates,)
    subject, subject_labels = _codes(frame["subject"])
    indices = C.lottery_outcome_indices(frame.columns)
    width = max(max(indices["a"], default=1), max(indices["b"], default=1))
    a_x, a_p = _option_arrays(frame, "a", indices["a"], width)
    b_x, b_p = _option_arrays(frame, "b", indices["b"], width)
    choice = frame["choice"].to_numpy(dtype=object)
    return LotteryData(
        subject=subject.astype(np.int32),
        choice_b=(choice == "B").astype(np.float64),
        a_x=a_x,
        a_p=a_p,
        b_x=b_x,
        b_p=b_p,
        covariates=numeric_covariates(frame, covariates),
        subject_labels=subject_labels,
        item_labels=frame["item"].to_numpy(),
    )


def numeric_covariates(frame: pd.DataFrame, names: Sequence[str]) -> dict[str, np.ndarray]:
    """Requested covariate columns as float64 arrays: they must exist, be numeric (or
    boolean) and have no missing values. Categorical covariates are encoded by the
    estimation engine, not here."""
    out: dict[str, np.ndarray] = {}
    for name in names:
        if name not in frame.columns:
            available = [c for c in frame.columns if c not in C.DECISION_REQUIRED]
            raise StopwiseInputError(
                f"covariate '{name}' is not a column of the data; other columns: "
                f"{', '.join(map(str, available)) or 'none'}"
            )
        column = frame[name]
        if not (
            pd.api.types.is_numeric_dtype(column.dtype) or pd.api.types.is_bool_dtype(column.dtype)
        ):
            example = column.dropna().iloc[0] if column.notna().any() else None
            raise StopwiseInputError(
                f"covariate '{name}' is not numeric (e.g. {example!r}); expected numbers. "
                "Encode categories as numbers, or let the fitting engine encode them"
            )
        values = column.to_numpy(dtype=np.float64, na_value=np.nan)
        if np.isnan(values).any():
            row = int(np.flatnonzero(np.isnan(values))[0])
            raise StopwiseInputError(
                f"covariate '{name}' has {int(np.isnan(values).sum())} missing value(s) "
                f"(first at row {row + 2} as in a CSV with a header); expected a number on "
                "every row"
            )
        out[name] = values
    return out


def _require_columns(frame: pd.DataFrame, names: Sequence[str]) -> None:
    missing = [n for n in names if n not in frame.columns]
    if missing:
        raise StopwiseInputError(
            f"the frame lacks the column(s) {', '.join(missing)}; load it with "
            "stopwise.load to validate it first"
        )


def _codes(labels: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Integer codes in sorted label order (order of appearance for unsortable labels)."""
    try:
        codes, uniques = pd.factorize(labels, sort=True)
    except TypeError:
        codes, uniques = pd.factorize(labels, sort=False)
    return codes.astype(np.int64), np.asarray(uniques, dtype=object)


def _trial_index(
    subject: np.ndarray, trial_ids: np.ndarray, subject_labels: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Global trial index sorted by (subject, trial) and its (subject, trial) labels."""
    trial_codes, trial_uniques = _codes(pd.Series(trial_ids))
    key = subject * max(len(trial_uniques), 1) + trial_codes
    index, keys = pd.factorize(key, sort=True)
    labels = np.empty((len(keys), 2), dtype=object)
    labels[:, 0] = subject_labels[keys // max(len(trial_uniques), 1)]
    labels[:, 1] = trial_uniques[keys % max(len(trial_uniques), 1)]
    return index.astype(np.int64), labels


def _contest_flags(frame: pd.DataFrame) -> np.ndarray:
    if "task" in frame.columns:
        return frame["task"].to_numpy(dtype=object) == "contest"
    if "n_players" in frame.columns:
        return frame["n_players"].to_numpy(dtype=np.float64, na_value=1.0) > 1
    return np.zeros(len(frame), dtype=bool)


def _float_column(frame: pd.DataFrame, name: str, default: float) -> np.ndarray:
    if name not in frame.columns:
        return np.full(len(frame), default, dtype=np.float64)
    values = frame[name].to_numpy(dtype=np.float64, na_value=np.nan)
    return np.where(np.isnan(values), default, values)


def _trial_config(frame: pd.DataFrame, contest: np.ndarray) -> np.ndarray:
    """(n_obs, 16) per-row configuration in the order of the condition table."""
    config = np.empty((len(frame), len(_COND_ORDER)), dtype=np.float64)
    config[:, 0] = frame["p_survive"].to_numpy(dtype=np.float64)
    config[:, 1] = frame["gain"].to_numpy(dtype=np.float64)
    config[:, 2] = _float_column(frame, "start", 0.0)
    config[:, 3] = _float_column(frame, "bust_keep", 0.0)
    config[:, 4] = contest.astype(np.float64)
    config[:, 5] = np.where(contest, _float_column(frame, "n_players", 1.0), 1.0)
    config[:, 6] = np.where(contest, _float_column(frame, "prize", 0.0), 0.0)
    config[:, 7] = np.where(contest, _float_column(frame, "keep_bank", 1.0), 1.0)
    config[:, 8] = _float_column(frame, "pool_size", 0.0)
    config[:, 9] = _float_column(frame, "pool_bad", 0.0)
    config[:, 10] = _float_column(frame, "odds_known", 1.0)
    pool = config[:, 8] > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        first_chance = (config[:, 8] - config[:, 9]) / config[:, 8]
    config[:, 0] = np.where(pool, first_chance, config[:, 0])  # the step-0 chance (G / N)
    config[:, 11:16] = 0.0  # seen counts and sequential states, filled in by the caller
    return config


def _condition_table(config: np.ndarray, trial: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct configurations (one lookup per trial, since design is constant within a
    trial) and each row's index into them."""
    n_trials = int(trial.max()) + 1 if len(trial) else 0
    first = np.full(n_trials, -1, dtype=np.int64)
    rows = np.arange(len(trial))[::-1]
    first[trial[rows]] = rows
    per_trial = config[first]
    if n_trials == 0:
        return np.zeros(0, dtype=np.int64), np.zeros((0, config.shape[1]))
    inverse, table = unique_rows(per_trial)
    return inverse[trial], table


def unique_rows(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct rows in lexicographic order and each row's index into them (one 1-d unique
    per column, then a mixed-radix key: faster than np.unique(axis=0) on many rows)."""
    key = np.zeros(len(values), dtype=np.int64)
    radix = 1
    for j in range(values.shape[1]):
        uniques, codes = np.unique(values[:, j], return_inverse=True)
        radix *= max(len(uniques), 1)
        if radix > 2**62:  # too many combinations for one integer key
            table, inverse = np.unique(values, axis=0, return_inverse=True)
            return np.asarray(inverse).reshape(-1), table
        key = key * len(uniques) + codes.reshape(-1)
    _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    return inverse.reshape(-1), values[first]


def _group_index(frame: pd.DataFrame, contest: np.ndarray) -> np.ndarray:
    group = np.full(len(frame), -1, dtype=np.int64)
    if "group" not in frame.columns or not contest.any():
        return group
    codes, _ = _codes(frame["group"][contest])
    group[contest] = codes
    return group


def _option_arrays(
    frame: pd.DataFrame, option: str, indices: Sequence[int], width: int
) -> tuple[np.ndarray, np.ndarray]:
    n = len(frame)
    x = np.full((n, width), np.nan)
    p = np.zeros((n, width))
    for k in indices:
        x[:, k - 1] = frame[f"{option}_x{k}"].to_numpy(dtype=np.float64, na_value=np.nan)
        p[:, k - 1] = np.nan_to_num(
            frame[f"{option}_p{k}"].to_numpy(dtype=np.float64, na_value=np.nan), nan=0.0
        )
    first = x[:, 0:1]
    x = np.where(np.isnan(x) | (p == 0.0) & np.isnan(x), first, x)
    return np.nan_to_num(x, nan=0.0), p
