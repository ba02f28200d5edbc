"""Sequential-contest checks: the optional columns ``order`` and ``rival_bank`` (DESIGN.md).

``order`` (1 moves first, 2 second, ...) is an integer on contest rows only, at most
n_players, one value per trial, and within one contest (group x trial) either every player
has an order or none, and the orders are 1..k without gaps or repeats. ``rival_bank`` (the
best bank banked before a later mover; empty if every earlier mover busted) is a number >= 0,
one value per trial, needs an ``order`` column, is empty for first movers, and a file whose
contests have later movers must carry it (what the later mover saw).
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
