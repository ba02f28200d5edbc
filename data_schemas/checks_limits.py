"""Size checks on validated columns (limits in ``data_schemas.limits``): each reports its
findings as ``size_limit`` problems naming the limit."""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from . import columns as C
from .limits import MAX_DECISION_ROWS, MAX_LOTTERY_OUTCOMES, MAX_STEPS_PER_TRIAL
from .report import ProblemCollector


def report_steps_beyond_limit(
    collector: ProblemCollector, lines: np.ndarray, column: str, values: np.ndarray, ok: np.ndarray
) -> None:
    """Rows whose step / draws exceed MAX_STEPS_PER_TRIAL."""
    with np.errstate(invalid="ignore"):
        beyond = np.flatnonzero(ok & (values > MAX_STEPS_PER_TRIAL))
    collector.add_rows(
        "size_limit",
        lines[beyond],
        column,
        values[beyond],
        f"at most {MAX_STEPS_PER_TRIAL} successful draws in a trial (the documented limit "
        "per trial, see README 'Limits')",
    )


def decision_rows(draws: np.ndarray, ok: np.ndarray, censored: np.ndarray | None) -> int:
    """Decisions after expansion: draws + 1 per trial (draws for a censored trial)."""
    counted = np.where(ok, draws, 0.0)
    closing = np.where(censored == 1, 0.0, 1.0) if censored is not None else 1.0
    return int(np.sum(counted + np.where(ok, closing, 0.0)))


def report_too_many_decisions(collector: ProblemCollector, total: int) -> None:
    """Trial-level data that would expand beyond MAX_DECISION_ROWS decisions."""
    if total <= MAX_DECISION_ROWS:
        return
    collector.add(
        "size_limit",
        None,
        "draws",
        f"<{total} decisions in all>",
        f"at most {MAX_DECISION_ROWS} decisions (the documented limit, see README "
        "'Limits'); split the data by subject and fit the parts",
    )


def report_outcome_indices_beyond_limit(
    collector: ProblemCollector, names: Iterable[object]
) -> set[str]:
    """Lottery columns whose outcome index exceeds MAX_LOTTERY_OUTCOMES; returns them."""
    beyond = set()
    for name in names:
        parsed = C.lottery_outcome_column(str(name))
        if parsed is not None and parsed[2] > MAX_LOTTERY_OUTCOMES:
            beyond.add(str(name))
            collector.add(
                "size_limit",
                1,
                str(name),
                f"<outcome index {parsed[2]}>",
                f"at most {MAX_LOTTERY_OUTCOMES} outcomes per option (the documented limit, "
                "see README 'Limits'; options are padded to the widest)",
            )
    return beyond
