"""Experimental designs shared by the tests (designs only, never check values)."""

from __future__ import annotations

import numpy as np


def holt_laury_columns(chance: np.ndarray) -> dict[str, np.ndarray | float]:
    """Lottery columns of the Holt & Laury (2002, Table 1; from memory) price list for each
    row's chance k/10 of the high payoff: A = 2.00 / 1.60, B = 3.85 / 0.10."""
    chance = np.asarray(chance, dtype=np.float64)
    return {
        "a_x1": 2.0,
        "a_p1": chance,
        "a_x2": 1.6,
        "a_p2": 1 - chance,
        "b_x1": 3.85,
        "b_p1": chance,
        "b_x2": 0.1,
        "b_p2": 1 - chance,
    }
