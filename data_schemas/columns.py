"""Column specifications of the three data formats (DESIGN.md, "Data formats").

Decision level: one row per decision; trial level: one row per trial; lottery: one row per
binary choice. Everything that checks or converts data reads its column lists from here.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

DECISIONS = "decisions"
TRIALS = "trials"
LOTTERY = "lottery"
FORMATS = (DECISIONS, TRIALS, LOTTERY)

DECISION_REQUIRED = ("subject", "trial", "step", "p_survive", "gain", "action", "outcome")
TRIAL_REQUIRED = ("subject", "trial", "p_survive", "gain", "draws", "busted")
LOTTERY_REQUIRED = ("subject", "item", "choice")

# Per-trial design columns: constant within a trial (p_survive and gain are required).
TRIAL_CONFIG = (
    "p_survive",
    "gain",
    "start",
    "bust_keep",
    "task",
    "group",
    "n_players",
    "prize",
    "keep_bank",
    "pool_size",
    "pool_bad",
    "odds_known",
)
# Task variants: draws without replacement from a known pool; odds not told.
POOL_COLUMNS = ("pool_size", "pool_bad")
OPTIONAL_STOPPING = ("bank", *TRIAL_CONFIG[2:])  # every per-trial column but the required two
CONTEST_REQUIRED = ("group", "n_players", "prize")

# Values used when an optional column is absent.
DEFAULTS: dict[str, object] = {
    "start": 0.0,
    "bust_keep": 0.0,
    "task": "solo",
    "n_players": 1,
    "prize": 0.0,
    "keep_bank": 1,
}

ACTIONS = ("draw", "stop")
OUTCOMES = ("success", "bust")
TASKS = ("solo", "contest")
CHOICES = ("A", "B")

# Trial-level only: 1 marks a trial that ended without stop or bust (allow_censored=True).
CENSORED = "censored"

_LOTTERY_COLUMN = re.compile(r"^([ab])_([xp])([1-9][0-9]*)$")


def lottery_outcome_column(name: str) -> tuple[str, str, int] | None:
    """Parse ``a_x1``-style names into (option, "x"|"p", index); None for other names."""
    match = _LOTTERY_COLUMN.match(name)
    if match is None:
        return None
    return match.group(1), match.group(2), int(match.group(3))


def lottery_outcome_indices(columns: Iterable[str]) -> dict[str, list[int]]:
    """Outcome indices present per option: {"a": [1, 2], "b": [1, 2]} (from x or p columns)."""
    found: dict[str, set[int]] = {"a": set(), "b": set()}
    for name in columns:
        parsed = lottery_outcome_column(str(name))
        if parsed is not None:
            found[parsed[0]].add(parsed[2])
    return {option: sorted(indices) for option, indices in found.items()}


def detect_format(columns: Iterable[str]) -> str | None:
    """Tell the format from the column names: lottery (a ``choice`` or ``a_x1``-style
    column), decision level (``action``/``step``/``outcome``), trial level
    (``draws``/``busted``); None when no marker column is present."""
    names = {str(c) for c in columns}
    if "choice" in names or any(lottery_outcome_column(n) for n in names):
        return LOTTERY
    if names & {"action", "step", "outcome"}:
        return DECISIONS
    if names & {"draws", "busted"}:
        return TRIALS
    return None


def required_columns(fmt: str) -> tuple[str, ...]:
    return {DECISIONS: DECISION_REQUIRED, TRIALS: TRIAL_REQUIRED, LOTTERY: LOTTERY_REQUIRED}[fmt]
