"""Sequential-contest checks: the optional columns ``order`` and ``rival_bank`` (DESIGN.md).

``order`` (1 moves first, 2 second, ...) is an integer on contest rows only, at most
n_players, one value per trial, and within one contest (group x trial) either every player
has an order or none, and the orders are 1..k without gaps or repeats. ``rival_bank`` (the
best bank banked before a later mover; empty if every earlier mover busted) is a number >= 0,
one value per trial, needs an ``order`` column, is empty for first movers, a file whose
contests have later movers must carry it (what the later mover saw), and it must equal the
best final bank of the earlier movers of the contest that did not bust.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .checker import Checker, Column

SEQUENTIAL_COLUMNS = ("order", "rival_bank")


def check_sequential(
    ch: Checker,
    cols: dict[str, Column | None],
    subject: np.ndarray,
    trial: np.ndarray,
    contest: np.ndarray,
) -> None:
    """Report every problem of ``order`` / ``rival_bank`` (module docstring)."""
    if not (ch.has("order") or ch.has("rival_bank")):
        return
    order = ch.numeric(
        "order",
        False,
        "an integer >= 1 (1 moves first, 2 second, ...)",
        integer=True,
        bounds=(1.0, np.inf, False, False),
    )
    rival = ch.numeric(
        "rival_bank",
        False,
        "a finite number >= 0 (the best bank banked before this mover)",
        bounds=(0.0, np.inf, False, False),
    )
    if order is None:
        ch.collector.add(
            "sequential_fields",
            int(ch.lines[0]),
            "order",
            "<no such column>",
            "an 'order' column (1 moves first, 2 second, ...) beside 'rival_bank'",
        )
        return
    given = order.ok & ~np.isnan(order.values)
    _report(
        ch,
        np.flatnonzero(given & ~contest),
        "order",
        order.values,
        "an empty order on a solo row (order belongs to contest rows)",
    )
    n_players = cols.get("n_players")
    if n_players is not None:
        over = given & contest & n_players.ok & (order.values > n_players.values)
        _report(ch, np.flatnonzero(over), "order", order.values, "an order <= n_players")
    valid = (subject >= 0) & (trial >= 0)
    _check_constant(ch, order, valid, subject, trial, "order")
    later = given & contest & (order.values >= 2)
    if rival is None:
        if later.any():
            first = int(np.flatnonzero(later)[0])
            ch.collector.add(
                "sequential_fields",
                int(ch.lines[first]),
                "rival_bank",
                "<no such column>",
                "a 'rival_bank' column: what each later mover saw (the best bank banked "
                f"before them; {int(later.sum())} rows of later movers)",
            )
    else:
        rival_given = rival.ok & ~np.isnan(rival.values)
        first_movers = np.flatnonzero(given & (order.values == 1) & rival_given)
        _report(
            ch,
            first_movers,
            "rival_bank",
            rival.values,
            "an empty rival_bank for a first mover (order 1 saw no rival)",
        )
        orphans = np.flatnonzero(rival_given & ~given)
        _report(ch, orphans, "rival_bank", rival.values, "an order on every row with a rival_bank")
        _check_constant(ch, rival, valid, subject, trial, "rival_bank")
    group = cols.get("group")
    if group is not None:
        _check_group_orders(ch, order, group, subject, trial, contest & valid & group.ok)
    check_rival_banks(ch)


def _report(ch: Checker, rows: np.ndarray, name: str, values: np.ndarray, expected: str) -> None:
    if len(rows):
        ch.collector.add_rows("sequential_fields", ch.lines[rows], name, values[rows], expected)


def _ok_or_empty(ch: Checker, column: Column, name: str) -> np.ndarray:
    """Rows whose cell is a valid value or empty (wrong cells are reported elsewhere)."""
    return column.ok | np.asarray(ch.empty_mask(ch.frame[name]), dtype=bool)


def _check_constant(
    ch: Checker,
    column: Column,
    valid: np.ndarray,
    subject: np.ndarray,
    trial: np.ndarray,
    name: str,
) -> None:
    """One value (or all empty) per trial: rows that differ from their trial's first row."""
    rows = np.flatnonzero(valid & _ok_or_empty(ch, column, name))
    if len(rows) == 0:
        return
    frame = pd.DataFrame(
        {"subject": subject[rows], "trial": trial[rows], "value": column.values[rows]}
    )
    first = frame.groupby(["subject", "trial"], sort=False)["value"].transform("first")
    both_nan = frame["value"].isna() & first.isna()
    differ = rows[((frame["value"] != first) & ~both_nan).to_numpy()]
    _report(ch, differ, name, column.values, f"one {name} per trial (the trial's first row)")


def _check_group_orders(
    ch: Checker,
    order: Column,
    group: Column,
    subject: np.ndarray,
    trial: np.ndarray,
    usable: np.ndarray,
) -> None:
    """Within a contest (group x trial): every player has an order or none, and the
    players' orders are 1..k, each once."""
    rows = np.flatnonzero(usable & _ok_or_empty(ch, order, "order"))
    if len(rows) == 0:
        return
    frame = pd.DataFrame(
        {
            "group": group.values[rows],
            "trial": trial[rows],
            "subject": subject[rows],
            "order": order.values[rows],
            "line": ch.lines[rows],
        }
    ).drop_duplicates(["group", "trial", "subject"])
    for _, players in frame.groupby(["group", "trial"], sort=False):
        orders = players["order"].to_numpy()
        present = ~np.isnan(orders)
        if not present.any():
            continue
        line = int(players["line"].min())
        shown = ", ".join("empty" if np.isnan(o) else str(int(o)) for o in orders)
        if not present.all():
            expected = "an order for every player of the contest or for none"
        elif sorted(orders.astype(int)) != list(range(1, len(orders) + 1)):
            expected = f"orders 1..{len(orders)}, each once, among the contest's players"
        else:
            continue
        ch.collector.add("sequential_order", line, "order", f"<orders {shown}>", expected)


def final_banks(frame: pd.DataFrame) -> pd.DataFrame:
    """One row per (subject, trial) of the raw frame: the final bank and whether it busted.
    Trial level: start + draws*gain (bust: bust_keep times that); decision level: the
    trial's last row, start + step*gain, busted when its outcome is 'bust'."""

    def number(name: str, default: float) -> pd.Series:
        if name not in frame.columns:
            return pd.Series(default, index=frame.index, dtype=float)
        return pd.to_numeric(frame[name], errors="coerce").fillna(default)

    start, gain, keep = number("start", 0.0), number("gain", np.nan), number("bust_keep", 0.0)
    if "draws" in frame.columns:
        level = number("draws", np.nan)
        busted = number("busted", np.nan) == 1
        rows = pd.DataFrame({"subject": frame["subject"], "trial": frame["trial"]})
    else:
        step = number("step", np.nan)
        last = step.groupby([frame["subject"], frame["trial"]], sort=False).transform("max")
        keep_rows = step == last
        level = step[keep_rows]
        busted = frame.loc[keep_rows, "outcome"].astype(str) == "bust"
        rows = frame.loc[keep_rows, ["subject", "trial"]]
        start, gain, keep = start[keep_rows], gain[keep_rows], keep[keep_rows]
    bank = start + level * gain
    out = rows.assign(final=np.where(busted, keep * bank, bank), busted=busted.to_numpy())
    return out.drop_duplicates(["subject", "trial"])


def check_rival_banks(ch: Checker) -> None:
    """Each later mover's rival_bank equals the best bank of the earlier movers of the same
    contest (group x trial) that did not bust (empty when all of them busted); run only on a
    file without other problems."""
    needed = {"group", "order", "rival_bank", "subject", "trial"}
    if not needed <= set(ch.frame.columns) or not ch.collector.ok:
        return
    frame = ch.frame
    finals = final_banks(frame)
    per_trial = frame.drop_duplicates(["subject", "trial"])[
        ["subject", "trial", "group", "order", "rival_bank"]
    ].merge(finals, on=["subject", "trial"])
    per_trial = per_trial[per_trial["order"].notna()]
    line_of = pd.Series(ch.lines, index=frame.index)
    first_line = (
        line_of.groupby([frame["subject"], frame["trial"]], sort=False).min().rename("line")
    )
    per_trial = per_trial.merge(first_line, left_on=["subject", "trial"], right_index=True)
    for _, contest in per_trial.groupby(["group", "trial"], sort=False):
        for _, mover in contest.iterrows():
            earlier = contest[(contest["order"] < mover["order"]) & ~contest["busted"]]
            if mover["order"] < 2:
                continue
            seen = pd.to_numeric(pd.Series([mover["rival_bank"]]), errors="coerce").iloc[0]
            expected = earlier["final"].max() if len(earlier) else np.nan
            same = (np.isnan(seen) and np.isnan(expected)) or (
                not np.isnan(seen)
                and not np.isnan(expected)
                and abs(seen - expected) <= 1e-9 * max(1.0, abs(expected))
            )
            if not same:
                want = (
                    "empty (every earlier mover busted)"
                    if np.isnan(expected)
                    else (f"{expected:g}")
                )
                ch.collector.add(
                    "rival_bank_mismatch",
                    int(mover["line"]),
                    "rival_bank",
                    mover["rival_bank"],
                    f"the best bank of the earlier movers in this contest: {want}",
                )
