"""Task-variant columns of decision-level stopping data (DESIGN.md, "Task variants").

- ``pool_size`` N and ``pool_bad`` B (integers, per trial, both given or both empty): draws
  without replacement from N items of which B bust. With G = N - B good items, the draw at
  step s survives with chance (G - s) / (N - s), and ``p_survive`` on that row must equal it
  (absolute tolerance ``POOL_P_TOL``). At s = G only bad items are left: the trial ends
  there with a forced "stop" whose p_survive is 0 (the only place a p_survive of 0 is
  accepted); steps beyond G cannot occur.
- ``odds_known`` (0 or 1, per trial, empty = 1): 0 marks trials whose survival chance was
  not told to the participant; ``p_survive`` stays the true chance (the simulator's).

Constancy within a trial is checked with the other design columns (checks_sequences); for
pool rows ``p_survive`` is exempt from that check, since it changes with the step.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import columns as C
from .checker import Checker, Column

POOL_P_TOL = 1e-6
SHOWN = 1000  # expectations built for at most this many rows per kind (the report keeps fewer)


def check_pool_columns(ch: Checker) -> dict[str, Column | None]:
    """Type and range checks of pool_size, pool_bad and odds_known (None when absent)."""
    return {
        "pool_size": ch.numeric(
            "pool_size",
            False,
            "an integer >= 2 (items in the pool), or empty for constant odds",
            integer=True,
            bounds=(2.0, np.inf, False, False),
            range_kind="pool_range",
        ),
        "pool_bad": ch.numeric(
            "pool_bad",
            False,
            "an integer >= 1 (bad items in the pool), or empty for constant odds",
            integer=True,
            bounds=(1.0, np.inf, False, False),
            range_kind="pool_range",
        ),
        "odds_known": ch.numeric(
            "odds_known",
            False,
            "0 or 1 (0 = the survival chance was not told), or empty for 1",
            integer=True,
            bounds=(0.0, 1.0, False, False),
        ),
    }


def pool_rows(cols: dict[str, Column | None]) -> np.ndarray | None:
    """Rows of pool trials (a valid pool_size); None when the data have no pool column."""
    size = cols.get("pool_size")
    return None if size is None else size.ok.copy()


def pool_survival_chance(pool_size: np.ndarray, pool_bad: np.ndarray, step: np.ndarray) -> Any:
    """(G - s) / (N - s) with G = N - B: the chance that the draw at step s survives."""
    good = pool_size - pool_bad
    with np.errstate(divide="ignore", invalid="ignore"):
        return (good - step) / (pool_size - step)


def check_pool_rows(
    ch: Checker, cols: dict[str, Column | None], step: Column | None, action: Column | None
) -> None:
    """Both pool columns or neither per row; B < N; s <= G with a stop at s = G;
    p_survive = (G - s) / (N - s); p_survive 0 nowhere else."""
    size, bad = cols.get("pool_size"), cols.get("pool_bad")
    if size is None and bad is None:
        return
    _check_zero_chances(ch, cols, step, action)
    if size is None or bad is None:
        absent = "pool_bad" if bad is None else "pool_size"
        ch.missing_column(absent, [str(c) for c in ch.frame.columns])
        return
    given_size = ~ch.empty_mask(ch.frame["pool_size"]).astype(bool)
    given_bad = ~ch.empty_mask(ch.frame["pool_bad"]).astype(bool)
    pairs = (("pool_bad", given_size & ~given_bad), ("pool_size", given_bad & ~given_size))
    for name, lacking in pairs:
        idx = np.flatnonzero(lacking)
        ch.collector.add_rows(
            "pool_range",
            ch.lines[idx],
            name,
            np.full(len(idx), np.nan),
            "pool_size and pool_bad both given (a pool trial) or both empty (constant odds)",
        )
    both = size.ok & bad.ok
    too_many = np.flatnonzero(both & (bad.values >= size.values))
    ch.collector.add_rows(
        "pool_range",
        ch.lines[too_many],
        "pool_bad",
        bad.values[too_many],
        [f"fewer bad items than pool_size = {size.values[i]:g}" for i in too_many[:SHOWN]],
    )
    if step is None:
        return
    _check_pool_chances(ch, cols, step, both & (bad.values < size.values) & step.ok)


def _check_zero_chances(
    ch: Checker, cols: dict[str, Column | None], step: Column | None, action: Column | None
) -> None:
    """p_survive 0 only on a pool row at s = G (no good item left), and there a "stop"."""
    p, size, bad = cols.get("p_survive"), cols.get("pool_size"), cols.get("pool_bad")
    if p is None:
        return
    zero = p.ok & (p.values == 0.0)
    cleared = np.zeros(ch.n, dtype=bool)
    if size is not None and bad is not None and step is not None:
        cleared = size.ok & bad.ok & step.ok & (step.values == size.values - bad.values)
    stray = np.flatnonzero(zero & ~cleared)
    ch.collector.add_rows(
        "p_survive_range",
        ch.lines[stray],
        "p_survive",
        p.values[stray],
        "a probability strictly between 0 and 1 (0 only where a pool has no good item left)",
    )
    if action is None:
        return
    stop_code = C.ACTIONS.index("stop")
    drawn = np.flatnonzero(cleared & action.ok & (action.values != stop_code))
    ch.collector.add_rows(
        "pool_p_survive",
        ch.lines[drawn],
        "action",
        np.full(len(drawn), "draw", dtype=object),
        "'stop': no good item is left in the pool, so the trial ends here",
    )


def _check_pool_chances(
    ch: Checker, cols: dict[str, Column | None], step: Column, rows: np.ndarray
) -> None:
    size, bad, p = cols["pool_size"], cols["pool_bad"], cols.get("p_survive")
    good = size.values - bad.values
    beyond = np.flatnonzero(rows & (step.values > good))
    ch.collector.add_rows(
        "pool_p_survive",
        ch.lines[beyond],
        "step",
        step.values[beyond],
        [f"at most the pool's {good[i]:g} good items" for i in beyond[:SHOWN]],
    )
    if p is None:
        return
    checked = rows & (step.values <= good) & p.ok
    expected = pool_survival_chance(size.values, bad.values, step.values)
    off = np.flatnonzero(checked & (np.abs(p.values - expected) > POOL_P_TOL))
    ch.collector.add_rows(
        "pool_p_survive",
        ch.lines[off],
        "p_survive",
        p.values[off],
        [
            f"(good left)/(items left) = ({good[i]:g} - {step.values[i]:g})/"
            f"({size.values[i]:g} - {step.values[i]:g}) = {expected[i]:.6g}"
            for i in off[:SHOWN]
        ],
    )


def check_variant_contests(ch: Checker, cols: dict[str, Column | None], contest: Any) -> None:
    """Contest rows with a pool or untold odds are refused: the contest games assume one
    constant, told survival chance (refused rather than fitted as if it were)."""
    size, known = cols.get("pool_size"), cols.get("odds_known")
    for name, column, flagged in (
        ("pool_size", size, None if size is None else size.ok),
        ("odds_known", known, None if known is None else known.ok & (known.values == 0)),
    ):
        if column is None:
            continue
        rows = np.flatnonzero(contest & flagged)
        ch.collector.add_rows(
            "variant_contest",
            ch.lines[rows],
            name,
            column.values[rows],
            "a solo trial: contests from a pool or with untold odds are not modelled",
        )
