"""Contest checks: contest rows need group, n_players and prize, and each group holds
n_players subjects."""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import columns as C
from .checker import Checker, Column
from .report import show_value


def contest_rows(ch: Checker, cols: dict[str, Column | None]) -> np.ndarray:
    """Rows of contest trials: task 'contest', or (without a task column) n_players > 1."""
    task = cols.get("task")
    if task is not None:
        return task.values == C.TASKS.index("contest")
    n_players = cols.get("n_players")
    if n_players is not None:
        with np.errstate(invalid="ignore"):
            return n_players.values > 1
    return np.zeros(ch.n, dtype=bool)


def check_contest(
    ch: Checker, cols: dict[str, Column | None], subject: np.ndarray, contest: np.ndarray
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
