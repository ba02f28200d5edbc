"""What each mover of a sequential contest saw: the state of the game before their turn.

Before mover j (``order`` j >= 2) the state is (B, c): B the best final bank among the earlier
movers of the contest (group x trial), busted movers counted at their kept bank
``bust_keep * (start + k * gain)``, and c the number of earlier movers at B (equal within a
relative 1e-9). Both come from the earlier movers' own rows when all of them are in the
data. Otherwise, for the second mover only, from ``rival_bank`` (B = rival_bank, c = 1) or,
when it is empty (the first mover busted) and ``bust_keep`` is 0, B = 0 and c = 1. A state
that cannot be known (e.g. a third mover without the first two movers' rows) is marked
unknown; a model that needs it refuses such rows.

Per row the result holds ``order`` (0 = not sequential), ``seen_best`` (B; -1 for a first
mover, a simultaneous row or an unknown state) and ``seen_tied`` (c; 0 for a first mover or
a simultaneous row, -1 for an unknown state).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .checks_sequential import final_banks

TIE_RELATIVE = 1e-9
NO_STATE = -1.0
UNKNOWN_TIED = -1.0


def sequential_states(frame: pd.DataFrame, contest: np.ndarray) -> np.ndarray:
    """(n_rows, 3): order, seen_best, seen_tied per row (module docstring)."""
    out = np.zeros((len(frame), 3))
    out[:, 1] = NO_STATE
    if "order" not in frame.columns or len(frame) == 0:
        return out
    order = pd.to_numeric(frame["order"], errors="coerce").to_numpy(dtype=float)
    order = np.where(contest & np.isfinite(order), order, 0.0)
    out[:, 0] = order
    later = order >= 2
    if not later.any():
        return out
    keys = pd.MultiIndex.from_arrays([frame["subject"], frame["trial"]])
    states = _states_per_trial(frame, order)
    found = states.reindex(keys)
    best = found["best"].to_numpy(dtype=float)
    tied = found["tied"].to_numpy(dtype=float)
    known = later & np.isfinite(best) & np.isfinite(tied)
    out[:, 1] = np.where(known, best, NO_STATE)
    out[:, 2] = np.where(later, np.where(known, tied, UNKNOWN_TIED), 0.0)
    return out


def _states_per_trial(frame: pd.DataFrame, order: np.ndarray) -> pd.DataFrame:
    """Per (subject, trial) of a later mover: best (B) and tied (c), NaN when unknown."""
    finals = final_banks(frame).set_index(["subject", "trial"])
    per_trial = frame.assign(_order=order).drop_duplicates(["subject", "trial"])
    per_trial = per_trial.set_index(["subject", "trial"])
    per_trial = per_trial.join(finals[["final", "busted"]])
    per_trial["rival"] = _number(per_trial, "rival_bank", np.nan)
    per_trial["keep"] = _number(per_trial, "bust_keep", 0.0)
    result = pd.DataFrame(index=per_trial.index[per_trial["_order"] >= 2], columns=["best", "tied"])
    result = result.astype(float)
    if "group" in per_trial.columns:
        from_rows = _states_from_rows(per_trial)
        result.loc[from_rows.index.intersection(result.index)] = from_rows
    fallback = per_trial.loc[result.index]
    missing = result["best"].isna() & (fallback["_order"] == 2)
    rival = fallback["rival"]
    zero_bust = rival.isna() & (fallback["keep"] == 0.0)
    result.loc[missing & rival.notna(), "best"] = rival
    result.loc[missing & rival.notna(), "tied"] = 1.0
    result.loc[missing & zero_bust, "best"] = 0.0
    result.loc[missing & zero_bust, "tied"] = 1.0
    return result


def _states_from_rows(per_trial: pd.DataFrame) -> pd.DataFrame:
    """best and tied of later movers whose earlier movers all have rows in the data."""
    table = per_trial.reset_index()[["subject", "trial", "group", "_order", "final"]]
    table = table[table["_order"] >= 1]
    pairs = table.merge(table, on=["group", "trial"], suffixes=("", "_earlier"))
    pairs = pairs[pairs["_order_earlier"] < pairs["_order"]]
    key = ["subject", "trial"]
    grouped = pairs.groupby(key)
    best = grouped["final_earlier"].max().rename("best")
    count = grouped["final_earlier"].size().rename("count")
    pairs = pairs.join(best, on=key)
    scale = np.maximum(1.0, np.abs(pairs["best"]))
    at_best = (pairs["best"] - pairs["final_earlier"]).abs() <= TIE_RELATIVE * scale
    tied = at_best.groupby([pairs["subject"], pairs["trial"]]).sum().rename("tied")
    out = pd.concat([best, tied.astype(float), count], axis=1)
    orders = table.set_index(key)["_order"]
    complete = out["count"] == orders.reindex(out.index) - 1
    return out.loc[complete, ["best", "tied"]]


def _number(table: pd.DataFrame, name: str, default: float) -> pd.Series:
    if name not in table.columns:
        return pd.Series(default, index=table.index, dtype=float)
    values = pd.to_numeric(table[name], errors="coerce").astype(float)
    return values if np.isnan(default) else values.fillna(default)


SEQUENTIAL_KEY_FIELDS = (
    "cond_gain",
    "cond_start",
    "cond_bust_keep",
    "cond_n_players",
    "cond_prize",
    "cond_keep_bank",
)


def sequential_game_key(bundle: Any) -> np.ndarray:
    """(7, n_cond): per condition, whether it is sequential and its game fields beyond the
    survival chance (zeros for other conditions): what sizes a sequential contest model."""
    order = np.asarray(bundle.cond_order, float)
    sequential = (order > 0.5) & (np.asarray(bundle.cond_contest, float) > 0.5)
    rows = [
        np.where(sequential, np.asarray(getattr(bundle, f), float), 0.0)
        for f in SEQUENTIAL_KEY_FIELDS
    ]
    return np.stack([sequential.astype(float), *rows])
