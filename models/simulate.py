"""Simulators: decision-level stopping data and lottery choices drawn from a model.

Stopping trials are drawn from the same per-condition P(draw) tables the likelihood uses.
For each condition the end of a trial is one categorical draw over "stop at s" and
"bust at s" (s = 0..H-1) and "forced stop at H":
    P(reach s) = prod_{j<s} P(draw | j) p,  P(stop at s) = P(reach s) P(stop | s),
    P(bust at s) = P(reach s) P(draw | s) (1 - p),  P(forced stop) = P(reach H),
sampled by inverse CDF with one uniform per trial (vectorised over trials). H is the
planner cap (ceil(log(1e-15)/log(max p)) for the design's largest p)
(but at most 10,000 unless the model's own cap is larger) or the model option
``max_target``, which then acts as a task cap for every policy.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

import jax
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData
from stopwise.data_schemas.bundle import unique_rows
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.stopping import (
    PLANNER_TOLERANCE,
    Caps,
    Conditions,
    RiskParts,
    policy_tables,
    step_chances,
    tolerance_steps,
    with_pool_urn,
)

SIMULATION_MAX_STEPS = 10_000  # forced stop for p_survive above 1 - 3.5e-3 (see above)
STOPPING_DESIGN_REQUIRED = ("subject", "trial", "p_survive", "gain")
LOTTERY_DESIGN_REQUIRED = ("subject", "item")
_LOTTERY_COLUMN = re.compile(r"^([ab])_([xp])(\d+)$")


# ----------------------------------------------------------------------------- stopping
def _require(design: pd.DataFrame, columns: tuple[str, ...], what: str) -> None:
    if not isinstance(design, pd.DataFrame):
        raise StopwiseInputError(f"{what} design must be a pandas DataFrame, got {type(design)}")
    missing = [c for c in columns if c not in design.columns]
    if missing:
        raise StopwiseInputError(
            f"{what} design lacks column(s) {', '.join(missing)}; expected "
            f"{', '.join(columns)} (one row per {'trial' if what == 'stopping' else 'item'})"
        )


def _numeric_column(design: pd.DataFrame, name: str, default: float | None = None) -> np.ndarray:
    if name not in design.columns:
        return np.full(len(design), float(default), dtype=np.float64)
    values = pd.to_numeric(design[name], errors="coerce").to_numpy(dtype=np.float64)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        row = int(bad[0])
        raise StopwiseInputError(
            f"design row {row}, column '{name}': expected a number, got {design[name].iloc[row]!r}"
        )
    return values


def _check_range(values: np.ndarray, name: str, ok: np.ndarray, expected: str) -> None:
    bad = np.flatnonzero(~ok)
    if bad.size:
        row = int(bad[0])
        raise StopwiseInputError(
            f"design row {row}, column '{name}': expected {expected}, got {values[row]!r}"
        )


def stopping_design_arrays(design: pd.DataFrame) -> tuple[Conditions, np.ndarray]:
    """Check a per-trial design; return its condition table and each trial's condition."""
    _require(design, STOPPING_DESIGN_REQUIRED, "stopping")
    p = _numeric_column(design, "p_survive")
    gain = _numeric_column(design, "gain")
    start = _numeric_column(design, "start", 0.0)
    keep = _numeric_column(design, "bust_keep", 0.0)
    _check_range(p, "p_survive", (p > 0) & (p < 1), "a probability strictly between 0 and 1")
    _check_range(gain, "gain", gain > 0, "a positive amount")
    _check_range(start, "start", start >= 0, "an amount >= 0")
    _check_range(keep, "bust_keep", (keep >= 0) & (keep <= 1), "a share between 0 and 1")
    if "task" in design.columns:
        contest = design["task"].astype(str).str.lower().eq("contest").to_numpy()
        _check_range(
            design["task"].to_numpy(), "task", ~contest, "'solo' (use a contest model for contests)"
        )
    duplicated = design.duplicated(["subject", "trial"]).to_numpy()
    _check_range(
        design["trial"].to_numpy(), "trial", ~duplicated, "a trial id unique within its subject"
    )
    size, bad = _pool_columns(design)
    pool = size > 0
    p = np.where(pool, (size - bad) / np.where(pool, size, 1.0), p)  # the first draw's chance
    config = np.stack([p, gain, start, keep, size, bad], axis=1)
    cond, table = unique_rows(config)  # np.unique(axis=0)'s answer, about 20x faster here
    conditions = Conditions(table[:, 0], table[:, 1], table[:, 2], table[:, 3])
    if pool.any():
        conditions = with_pool_urn(conditions, table[:, 4], table[:, 5])
    return conditions, cond


def _pool_columns(design: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """pool_size and pool_bad per trial (0, 0 without a pool); checked: 1 <= bad < size."""
    if "pool_size" not in design.columns and "pool_bad" not in design.columns:
        return np.zeros(len(design)), np.zeros(len(design))
    size = _numeric_column(design, "pool_size")
    bad = _numeric_column(design, "pool_bad")
    whole = (np.floor(size) == size) & (np.floor(bad) == bad)
    _check_range(size, "pool_size", whole & (size >= 2), "an integer pool size >= 2")
    _check_range(bad, "pool_bad", whole & (bad >= 1) & (bad < size), "1 <= pool_bad < pool_size")
    return size, bad


def simulation_steps(policy: str, caps: Caps, max_p_survive: float) -> int:
    """Table length H for simulation (forced stop at H); see the module docstring."""
    if caps.max_target is not None:
        return int(caps.max_target)
    if policy == "target":
        return caps.n_targets(0) - 1
    by_tolerance = tolerance_steps(max_p_survive, PLANNER_TOLERANCE)
    return max(caps.planner_cap(0), min(by_tolerance, SIMULATION_MAX_STEPS))


def end_log_probs(log_draw: np.ndarray, log_stop: np.ndarray, p: np.ndarray) -> np.ndarray:
    """log P(trial ends as [stop_0, bust_0, ..., stop_{H-1}, bust_{H-1}, forced stop_H]);
    ``p`` is p_survive per condition (n_cond,) or per condition and step (n_cond, H)."""
    p = np.asarray(p, dtype=np.float64)
    p = p if p.ndim == 2 else np.broadcast_to(p[:, None], log_draw.shape)
    with np.errstate(divide="ignore"):
        log_p = np.log(p)
        log_lose = np.log1p(-p)
    step_on = log_draw + log_p
    log_reach = np.concatenate(
        [np.zeros((len(p), 1)), np.cumsum(step_on, axis=1)], axis=1
    )  # (n_cond, H+1)
    stop = log_reach[:, :-1] + log_stop
    bust = log_reach[:, :-1] + log_draw + log_lose
    ends = np.stack([stop, bust], axis=2).reshape(len(p), -1)
    return np.concatenate([ends, log_reach[:, -1:]], axis=1)


def sample_trial_ends(
    log_draw: np.ndarray, log_stop: np.ndarray, p: np.ndarray, cond: np.ndarray, key: Any
) -> tuple[np.ndarray, np.ndarray]:
    """(end step, busted) per trial by inverse CDF over :func:`end_log_probs`."""
    log_end = end_log_probs(log_draw, log_stop, p)
    uniforms = np.asarray(jax.random.uniform(key, (len(cond),), dtype=np.float64))
    index = np.empty(len(cond), dtype=np.int64)
    for c in np.unique(cond):
        probs = np.exp(log_end[c] - np.max(log_end[c]))
        cdf = np.cumsum(probs)
        trials = np.flatnonzero(cond == c)
        index[trials] = np.searchsorted(cdf, uniforms[trials] * cdf[-1], side="right")
    index = np.minimum(index, log_end.shape[1] - 1)
    return index // 2, (index % 2 == 1)


ACTION_LABELS = np.array(["draw", "stop"], dtype=object)
OUTCOME_LABELS = np.array(["success", "bust", np.nan], dtype=object)


def expand_trials(design: pd.DataFrame, end_step: np.ndarray, busted: np.ndarray) -> pd.DataFrame:
    """Decision rows for each trial: draws with outcome success, then a stop or a bust. The
    numeric columns are read once per trial and repeated (``design`` is checked already)."""
    n_rows = end_step + 1
    trial_of_row = np.repeat(np.arange(len(design)), n_rows)
    first_row = np.concatenate([[0], np.cumsum(n_rows)[:-1]])
    step = np.arange(int(n_rows.sum())) - np.repeat(first_row, n_rows)
    last = step == end_step[trial_of_row]
    bust_row = last & busted[trial_of_row]
    # object columns by indexing small label arrays (shares the label objects; converting
    # a unicode array with astype(object) builds one string per row, a tenth of the study)
    action = ACTION_LABELS[(last & ~bust_row).astype(np.int64)]
    outcome = OUTCOME_LABELS[np.where(bust_row, 1, np.where(last, 2, 0))]
    rows = design.iloc[trial_of_row].reset_index(drop=True)
    start = _numeric_column(design, "start", 0.0)[trial_of_row]
    gain = _numeric_column(design, "gain")[trial_of_row]
    front = pd.DataFrame(
        {
            "subject": rows["subject"].to_numpy(),
            "trial": rows["trial"].to_numpy(),
            "step": step.astype(np.int64),
            "p_survive": _row_chances(design, trial_of_row, step),
            "gain": gain,
            "action": action,
            "outcome": outcome,
            "bank": start + step * gain,
            "start": start,
            "bust_keep": _numeric_column(design, "bust_keep", 0.0)[trial_of_row],
        }
    )
    extra = rows.drop(columns=[c for c in front.columns if c in rows.columns])
    return pd.concat([front, extra], axis=1)


def _row_chances(design: pd.DataFrame, trial_of_row: np.ndarray, step: np.ndarray) -> np.ndarray:
    """p_survive of each decision row (trial ``trial_of_row``, step ``step``): (G - s) / (N - s)
    in a pool of N with G good, else the trial's p_survive."""
    size, bad = (column[trial_of_row] for column in _pool_columns(design))
    pool = size > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        chance = (size - bad - step) / (size - step)
    return np.where(pool, chance, _numeric_column(design, "p_survive")[trial_of_row])


def simulate_stopping(
    policy: str,
    parts: RiskParts,
    caps: Caps,
    theta: Mapping[str, Any],
    design: pd.DataFrame,
    key: Any,
    tables_fn: Any = None,
) -> pd.DataFrame:
    """Decision-level data for one parameter vector over a per-trial design."""
    cond_table, cond = stopping_design_arrays(design)
    caps = caps.sized_for(cond_table.p_survive)
    n_steps = simulation_steps(policy, caps, float(np.max(cond_table.p_survive)))
    theta = {k: float(v) for k, v in theta.items()}
    if tables_fn is None:
        log_draw, log_stop = policy_tables(policy, parts, theta, cond_table, n_steps, caps, 0)
    else:
        log_draw, log_stop = tables_fn(theta, cond_table, n_steps, caps)
    chances = np.asarray(step_chances(cond_table, n_steps))
    end_step, busted = sample_trial_ends(
        np.asarray(log_draw), np.asarray(log_stop), chances, cond, key
    )
    return expand_trials(design.reset_index(drop=True), end_step, busted)


# ----------------------------------------------------------------------------- lottery
def lottery_design_arrays(design: pd.DataFrame) -> LotteryData:
    """Check a per-item lottery design; outcome arrays padded with p = 0 (first outcome)."""
    _require(design, LOTTERY_DESIGN_REQUIRED, "lottery")
    found: dict[str, set[int]] = {"a": set(), "b": set()}
    for name in design.columns:
        match = _LOTTERY_COLUMN.match(str(name))
        if match:
            found[match.group(1)].add(int(match.group(3)))
    if not found["a"] or not found["b"]:
        raise StopwiseInputError(
            "lottery design needs outcome columns a_x1, a_p1, ... and b_x1, b_p1, ..."
        )
    width = max(max(found["a"]), max(found["b"]))
    arrays = {}
    for option in ("a", "b"):
        xs, ps = [], []
        for k in range(1, width + 1):
            if k in found[option]:
                x, prob = _outcome_columns(design, option, k)
            else:
                x = _numeric_column(design, f"{option}_x1")
                prob = np.zeros(len(design))
            _check_range(prob, f"{option}_p{k}", (prob >= 0) & (prob <= 1), "a probability")
            xs.append(x)
            ps.append(prob)
        x_arr, p_arr = np.stack(xs, axis=1), np.stack(ps, axis=1)
        total = p_arr.sum(axis=1)
        _check_range(total, f"{option}_p*", np.abs(total - 1) < 1e-6, "probabilities summing to 1")
        arrays[option] = (x_arr, p_arr)
    n = len(design)
    return LotteryData(
        subject=np.zeros(n, np.int32),
        choice_b=np.zeros(n),
        a_x=arrays["a"][0],
        a_p=arrays["a"][1],
        b_x=arrays["b"][0],
        b_p=arrays["b"][1],
    )


def _outcome_columns(design: pd.DataFrame, option: str, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Outcome k of an option; an empty outcome (x and p missing, or x missing with p = 0)
    is absent: it gets probability 0 and repeats the option's first outcome."""
    x_name, p_name = f"{option}_x{k}", f"{option}_p{k}"
    x = pd.to_numeric(design[x_name], errors="coerce").to_numpy(dtype=np.float64)
    prob = pd.to_numeric(design[p_name], errors="coerce").to_numpy(dtype=np.float64)
    absent = np.isnan(x) & (np.isnan(prob) | (prob == 0))
    if k > 1 and absent.any():
        first = pd.to_numeric(design[f"{option}_x1"], errors="coerce").to_numpy(np.float64)
        x = np.where(absent, first, x)
        prob = np.where(absent, 0.0, prob)
    for name, values in ((x_name, x), (p_name, prob)):
        _check_range(values, name, np.isfinite(values), "a number")
    return x, prob


def simulate_lottery(
    predict: Any, theta: Mapping[str, Any], design: pd.DataFrame, key: Any
) -> pd.DataFrame:
    """Lottery choices ("A"/"B") for one parameter vector: B with probability P(B)."""
    data = lottery_design_arrays(design)
    prob_b = np.asarray(predict({k: float(v) for k, v in theta.items()}, data))
    uniforms = np.asarray(jax.random.uniform(key, (len(design),), dtype=np.float64))
    out = design.reset_index(drop=True).copy()
    out["choice"] = np.where(uniforms < prob_b, "B", "A")
    return out


# ----------------------------------------------------------------------------- public
