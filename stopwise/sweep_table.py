"""The table of a contest sweep (stopwise/sweep.py): probability columns, the setting's
columns, and the refusal message when points fail their certificate."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd


def probability_columns(sigma: np.ndarray) -> dict[str, float]:
    """One column prob_t per target t with sigma_t."""
    return {f"prob_{t}": float(q) for t, q in enumerate(sigma)}


def sweep_frame(rows: list[dict[str, Any]], s: Any) -> pd.DataFrame:
    """The rows of one sweep with its setting's players, keep_bank, concept and cap."""
    table = pd.DataFrame(rows)
    table.insert(2, "players", s.players)
    table.insert(3, "keep_bank", s.keep_bank)
    table.insert(4, "concept", s.concept)
    table.insert(5, "cap", s.cap)
    return table


def refusal_message(table: pd.DataFrame, concept: str) -> str:
    """Why a sweep is refused: how many points failed their certificate, the first few."""
    bad = table.loc[~table["certified"]]
    first = ", ".join(
        f"p_survive={r.p_survive:g} prize={r.prize:g} ({r.method})"
        for r in bad.head(3).itertuples()
    )
    return (
        f"{len(bad)} of {len(table)} points failed their certificate ({concept}): {first}. "
        "Try a finer grid (closer neighbours), a larger --max-target, or --allow-approximate "
        "to see the marked rows"
    )
