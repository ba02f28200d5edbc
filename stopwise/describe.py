"""The descriptive summary: the first table a researcher looks at.

Stopping data, per condition (p_survive, gain, task, prize, keep_bank, and start/bust_keep
when present): subjects, trials, draws attempted (mean and quartiles), final bank (mean and
quartiles), bust rate, mean stop step, and the risk-neutral benchmark beside them: the
optimal target n* (draw while bank < p g / ((1 - p)(1 - k)); p g / (1 - p) with start 0)
and its expected bank E[bank | n*]. For contests that benchmark is the solo one. Draws from
a pool (pool_size, pool_bad) are conditions of their own, shown with the first draw's
p_survive, and their benchmark is the pool's optimal stopping step found by backward
induction (models.pool_normative).
Lottery data: per item the share choosing B with both expected values, and per subject the
number of switches between A and B along each list (items in sorted order).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.load import Dataset, load
from stopwise.models.normative import risk_neutral_benchmark
from stopwise.models.pool_normative import pool_risk_neutral_benchmark

CONDITION_KEYS = ("p_survive", "gain", "task", "prize", "keep_bank")
OPTIONAL_KEYS = ("start", "bust_keep", "pool_size", "pool_bad")
CONTEST_ONLY_KEYS = ("prize", "keep_bank")  # not applicable to solo rows: shown empty


@dataclass(frozen=True)
class Description:
    """Summary tables of one data set (see the module docstring for the columns)."""

    kind: str
    source: str
    table: pd.DataFrame
    stop_steps: pd.DataFrame | None = None
    switching: pd.DataFrame | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)
    by: str | None = None

    def __str__(self) -> str:
        title = (
            "Stopping data by condition" if self.kind == "stopping" else "Lottery choices by item"
        )
        table = (
            _stopping_text(self.table, self.by)
            if self.kind == "stopping"
            else _frame_text(self.table)
        )
        parts = [f"{title} ({self.source})", table]
        if self.stop_steps is not None and len(self.stop_steps):
            parts += [
                "",
                "Stop steps (stopped trials: step -> count)",
                _stop_step_lines(self.stop_steps),
            ]
        if self.switching is not None and len(self.switching):
            parts += [
                "",
                "Switching between A and B per subject and list",
                _frame_text(_switch_summary(self.switching)),
            ]
        parts += [f"Note: {n}" for n in self.notes]
        return "\n".join(parts)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "kind": self.kind,
            "source": self.source,
            "by": self.by,
            "table": _records(blank_solo_contest_fields(self.table)),
            "notes": list(self.notes),
        }
        if self.stop_steps is not None:
            out["stop_steps"] = _records(blank_solo_contest_fields(self.stop_steps))
        if self.switching is not None:
            out["switching"] = _records(_switch_summary(self.switching))
        return out


def describe(
    data: str | os.PathLike[str] | pd.DataFrame | Dataset, by: str | None = None
) -> Description:
    """Describe a path, DataFrame or Dataset (validated on the way in); ``by`` splits every
    table by a column of the data as well (a covariate such as treatment, or subject)."""
    dataset = load(data)
    if by is not None:
        check_by_column(dataset.frame, by, dataset.source)
    if dataset.kind == "stopping":
        return _describe_stopping(dataset, by)
    return _describe_lottery(dataset, by)


def check_by_column(frame: pd.DataFrame, by: str, source: str) -> None:
    """``by`` must name a column of the data (its values then split the tables)."""
    if by not in frame.columns:
        raise StopwiseInputError(
            f"{source}: no column {by!r} to split by; the data have "
            f"{', '.join(map(str, frame.columns))}"
        )


def blank_solo_contest_fields(table: pd.DataFrame) -> pd.DataFrame:
    """prize and keep_bank empty (NaN) on solo rows, where they do not apply."""
    if "task" not in table.columns:
        return table
    out = table.copy()
    solo = out["task"].to_numpy() == "solo"
    for key in CONTEST_ONLY_KEYS:
        if key in out.columns:
            out[key] = out[key].astype(np.float64).where(~solo)
    return out


# ---------------------------------------------------------------------------------------
# stopping
# ---------------------------------------------------------------------------------------


def trial_summary(frame: pd.DataFrame, by: str | None = None) -> pd.DataFrame:
    """One row per trial: condition keys, subject (and the ``by`` column), draws attempted,
    successful draws, busted, stopped and the final bank (k * bank at a bust, the bank
    otherwise)."""
    keys = _condition_frame(frame)
    trial_id = frame.groupby(["subject", "trial"], sort=False, observed=True).ngroup()
    trial_id = trial_id.to_numpy()
    n_trials = int(trial_id.max()) + 1
    action = frame["action"].astype(object).to_numpy()
    outcome = frame["outcome"].astype(object).to_numpy()
    attempted = np.bincount(trial_id, weights=action == "draw", minlength=n_trials)
    successes = np.bincount(trial_id, weights=outcome == "success", minlength=n_trials)
    busted = np.bincount(trial_id, weights=outcome == "bust", minlength=n_trials) > 0
    stopped = np.bincount(trial_id, weights=action == "stop", minlength=n_trials) > 0
    first = np.full(n_trials, -1, dtype=np.int64)
    rows = np.arange(len(trial_id))[::-1]
    first[trial_id[rows]] = rows
    per_trial = keys.iloc[first].reset_index(drop=True)
    per_trial.insert(0, "subject", frame["subject"].to_numpy()[first])
    if by is not None and by != "subject":
        _require_constant_in_trials(frame[by].to_numpy(), trial_id, first, by)
        per_trial.insert(1, by, frame[by].to_numpy()[first])
    bank = per_trial["start"].to_numpy() + successes * per_trial["gain"].to_numpy()
    per_trial["draws_attempted"] = attempted.astype(np.int64)
    per_trial["successes"] = successes.astype(np.int64)
    per_trial["busted"] = busted
    per_trial["stopped"] = stopped
    per_trial["final_bank"] = np.where(busted, per_trial["bust_keep"].to_numpy() * bank, bank)
    return per_trial


def _condition_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """Condition keys per row, with defaults for absent columns; solo rows get prize 0 and
    keep_bank 1 (their values do not matter)."""
    n = len(frame)
    task = (
        frame["task"].astype(object).to_numpy()
        if "task" in frame.columns
        else np.full(n, "solo", dtype=object)
    )
    if "task" not in frame.columns and "n_players" in frame.columns:
        task = np.where(
            frame["n_players"].to_numpy(dtype=np.float64, na_value=1.0) > 1, "contest", "solo"
        ).astype(object)
    solo = task == "solo"

    def column(name: str, default: float) -> np.ndarray:
        if name not in frame.columns:
            return np.full(n, default, dtype=np.float64)
        values = frame[name].to_numpy(dtype=np.float64, na_value=np.nan)
        return np.where(np.isnan(values), default, values)

    pool_size, pool_bad = column("pool_size", 0.0), column("pool_bad", 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        first_chance = (pool_size - pool_bad) / pool_size
    p_survive = frame["p_survive"].to_numpy(dtype=np.float64)
    return pd.DataFrame(
        {
            "p_survive": np.where(pool_size > 0, first_chance, p_survive),
            "gain": frame["gain"].to_numpy(dtype=np.float64),
            "task": task,
            "prize": np.where(solo, 0.0, column("prize", 0.0)),
            "keep_bank": np.where(solo, 1, column("keep_bank", 1.0)).astype(np.int64),
            "start": column("start", 0.0),
            "bust_keep": column("bust_keep", 0.0),
            "pool_size": pool_size.astype(np.int64),
            "pool_bad": pool_bad.astype(np.int64),
        }
    )


def _require_constant_in_trials(
    values: np.ndarray, trial_id: np.ndarray, first: np.ndarray, column: str
) -> None:
    """A split column must be constant within each trial (a trial is described once)."""
    differs = pd.Series(values).ne(pd.Series(values[first[trial_id]])).to_numpy()
    differs &= ~(pd.isna(values) & pd.isna(values[first[trial_id]]))
    if differs.any():
        row = int(np.flatnonzero(differs)[0])
        raise StopwiseInputError(
            f"line {row + 2}, column {column!r}: the value changes within a trial; split by a "
            "column that is constant within each trial (a covariate or subject)"
        )


def _describe_stopping(dataset: Dataset, by: str | None = None) -> Description:
    frame = dataset.frame
    return describe_trials(trial_summary(frame, by), dataset.source, frame.columns, by)


def describe_trials(
    trials: pd.DataFrame, source: str, columns: Any, by: str | None = None
) -> Description:
    """The stopping description from the per-trial summary (``trial_summary``, possibly of
    several partitions stacked: every statistic is a function of the trials); ``columns``
    are the data's columns (which optional condition keys exist)."""
    keys = ([by] if by else []) + list(CONDITION_KEYS)
    keys += [k for k in OPTIONAL_KEYS if k in columns]
    grouped = trials.groupby(keys, sort=True)
    table = grouped.agg(
        n_subjects=("subject", "nunique"),
        n_trials=("draws_attempted", "size"),
        draws_mean=("draws_attempted", "mean"),
        draws_q25=("draws_attempted", lambda s: s.quantile(0.25)),
        draws_median=("draws_attempted", "median"),
        draws_q75=("draws_attempted", lambda s: s.quantile(0.75)),
        bank_mean=("final_bank", "mean"),
        bank_q25=("final_bank", lambda s: s.quantile(0.25)),
        bank_median=("final_bank", "median"),
        bank_q75=("final_bank", lambda s: s.quantile(0.75)),
        bust_rate=("busted", "mean"),
        stop_step_mean=("successes", lambda s: np.nan),
    ).reset_index()
    stopped = trials[trials["stopped"]]
    mean_stop = stopped.groupby(keys, sort=True)["successes"].mean().rename("stop_step_mean")
    table = table.drop(columns="stop_step_mean").merge(mean_stop.reset_index(), on=keys, how="left")
    benchmark = [_benchmark(row) for row in table.itertuples(index=False)]
    table["rn_target"] = [b[0] for b in benchmark]
    table["rn_bank"] = [b[1] for b in benchmark]
    stop_steps = (
        stopped.groupby([*keys, "successes"], sort=True)
        .size()
        .rename("n")
        .reset_index()
        .rename(columns={"successes": "stop_step"})
    )
    totals = stop_steps.groupby(keys)["n"].transform("sum")
    stop_steps["share"] = stop_steps["n"] / totals
    notes = [
        "rn_target = risk-neutral optimal number of successful draws (the smaller one "
        "in a tie); rn_bank = its expected bank; draws = draws attempted; bank = final "
        "bank."
    ]
    if (table["task"] == "contest").any():
        notes.append(
            "for contest rows rn_target/rn_bank are the solo benchmark, not a contest equilibrium."
        )
    return Description("stopping", source, table, stop_steps, None, tuple(notes), by)


def _benchmark(row: Any) -> tuple[float, float]:
    """(rn_target, rn_bank) of a condition: the pool's backward induction or the threshold."""
    start, keep = getattr(row, "start", 0.0), getattr(row, "bust_keep", 0.0)
    if getattr(row, "pool_size", 0) > 0:
        return pool_risk_neutral_benchmark(row.pool_size, row.pool_bad, row.gain, start, keep)
    return risk_neutral_benchmark(row.p_survive, row.gain, start, keep)


def _stop_step_lines(stop_steps: pd.DataFrame) -> str:
    keys = [c for c in stop_steps.columns if c not in ("stop_step", "n", "share")]
    lines = []
    for key, part in stop_steps.groupby(keys, sort=True):
        values = dict(zip(keys, key))
        solo = values.get("task") == "solo"
        label = ", ".join(
            f"{k}={_short(v)}" for k, v in values.items() if not (solo and k in CONTEST_ONLY_KEYS)
        )
        counts = " ".join(f"{int(s)}:{int(n)}" for s, n in zip(part["stop_step"], part["n"]))
        lines.append(f"  {label}: {counts}")
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------
# lottery
# ---------------------------------------------------------------------------------------


def _expected_value(frame: pd.DataFrame, option: str) -> np.ndarray:
    total = np.zeros(len(frame))
    for name in frame.columns:
        if name.startswith(f"{option}_x"):
            k = name[len(option) + 2 :]
            x = frame[name].to_numpy(dtype=np.float64, na_value=np.nan)
            p = frame[f"{option}_p{k}"].to_numpy(dtype=np.float64, na_value=np.nan)
            total += np.where(np.isnan(p) | (p == 0), 0.0, p * np.nan_to_num(x))
    return total


def _describe_lottery(dataset: Dataset, by: str | None = None) -> Description:
    frame = dataset.frame.copy()
    frame["chose_b"] = (frame["choice"].astype(object) == "B").astype(np.float64)
    frame["ev_a"] = _expected_value(frame, "a")
    frame["ev_b"] = _expected_value(frame, "b")
    keys = ["block", "item"] if "block" in frame.columns else ["item"]
    if by is not None and by not in keys:
        keys = [by, *keys]
    table = (
        frame.groupby(keys, sort=True)
        .agg(
            n=("chose_b", "size"),
            share_b=("chose_b", "mean"),
            ev_a=("ev_a", "mean"),
            ev_b=("ev_b", "mean"),
        )
        .reset_index()
    )
    switching = switching_by_subject(frame)
    notes = (
        "switches = changes between A and B along a list ordered by item; a single "
        "switch (or none) is a consistent response pattern.",
    )
    return Description("lottery", dataset.source, table, None, switching, notes, by)


def switching_by_subject(frame: pd.DataFrame) -> pd.DataFrame:
    """Per subject (and block, when present): choices of B, number of A/B switches along
    the items in sorted order, and the first item chosen B."""
    keys = ["subject", "block"] if "block" in frame.columns else ["subject"]
    ordered = frame.sort_values([*keys, "item"], kind="stable")
    chose_b = (ordered["choice"].astype(object) == "B").to_numpy()
    same_list = (ordered[keys].shift() == ordered[keys]).all(axis=1).to_numpy()
    switched = same_list & (chose_b != np.r_[False, chose_b[:-1]])
    ordered = ordered.assign(_b=chose_b, _switch=switched)
    result = ordered.groupby(keys, sort=True).agg(
        n_items=("_b", "size"), n_b=("_b", "sum"), n_switches=("_switch", "sum")
    )
    first_b = ordered[ordered["_b"]].groupby(keys, sort=True)["item"].first()
    result["first_b_item"] = first_b
    return result.reset_index()


def _switch_summary(switching: pd.DataFrame) -> pd.DataFrame:
    keys = ["block"] if "block" in switching.columns else []
    data = switching.assign(multiple=switching["n_switches"] > 1)
    if not keys:
        data = data.assign(block="all")
        keys = ["block"]
    return (
        data.groupby(keys, sort=True)
        .agg(
            n_subjects=("subject", "nunique"),
            mean_b=("n_b", "mean"),
            median_switches=("n_switches", "median"),
            share_multiple=("multiple", "mean"),
        )
        .reset_index()
    )


# ---------------------------------------------------------------------------------------
# printing
# ---------------------------------------------------------------------------------------


def _short(value: Any) -> str:
    if isinstance(value, (float, np.floating)):
        return f"{float(value):g}"
    return str(value)


def _stopping_text(table: pd.DataFrame, by: str | None = None, max_columns: int = 6) -> str:
    """Few conditions: one column per condition (reads down); many: one row each."""
    if len(table) > max_columns:
        return _frame_text(blank_solo_contest_fields(table))
    keys = [k for k in (by, *CONDITION_KEYS, *OPTIONAL_KEYS) if k and k in table.columns]
    labels = [
        " ".join(
            f"{_KEY_LABELS.get(k, k)}={_short(v)}"
            for k, v in zip(keys, row)
            if not (k in ("prize", "keep_bank") and row[keys.index("task")] == "solo")
        )
        for row in table[keys].itertuples(index=False)
    ]
    body = table.drop(columns=keys).T
    body.columns = [f"({i + 1})" for i in range(len(labels))]
    legend = "\n".join(f"  ({i + 1}) {label}" for i, label in enumerate(labels))
    return f"{legend}\n{body.to_string(float_format=_number)}"


_KEY_LABELS = {"p_survive": "p", "keep_bank": "keep_bank"}


def _number(value: float) -> str:
    """Whole numbers (counts) as integers, other values to three significant digits."""
    return f"{value:.0f}" if float(value).is_integer() else f"{value:.3g}"


def _frame_text(frame: pd.DataFrame) -> str:
    """A table with empty cells (not applicable) shown as "-"."""
    return frame.to_string(index=False, float_format=_number, na_rep="-")


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return frame.to_dict(orient="records")
