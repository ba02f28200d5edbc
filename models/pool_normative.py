"""Risk-neutral benchmark for draws without replacement from a known pool (numpy only).

N items of which B are bad and G = N - B good. At step s (s good items drawn so far) the
next draw survives with chance p_s = (G - s) / (N - s); at s = G no good item is left and the
trial ends with the bank. With b_s = start + s gain and k = bust_keep, backward induction:

    V(G) = b_G,   D(s) = p_s V(s + 1) + (1 - p_s) k b_s,   V(s) = max(b_s, D(s)).

The optimal rule stops at the first step with b_s >= D(s) (two targets when they tie). The
one-step gain of drawing, p_s (b_s + g) + (1 - p_s) k b_s - b_s, falls as s rises (p_s falls
and the bank grows), so the rule is a threshold on the step; the induction does not rely on it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

_TIE_TOL = 1e-9


def check_pool(pool_size: int, pool_bad: int) -> tuple[int, int]:
    """(N, B) as integers with 1 <= B < N."""
    size, bad = int(pool_size), int(pool_bad)
    if size != pool_size or bad != pool_bad or not 1 <= bad < size:
        raise ValueError(
            f"a pool needs integers 1 <= pool_bad < pool_size, got {pool_size}, {pool_bad}"
        )
    return size, bad


def pool_chances(pool_size: int, pool_bad: int) -> np.ndarray:
    """p_s = (G - s) / (N - s) for s = 0..G (the last is 0)."""
    size, bad = check_pool(pool_size, pool_bad)
    steps = np.arange(size - bad + 1, dtype=np.float64)
    return (size - bad - steps) / (size - steps)


@dataclass(frozen=True)
class PoolProgramme:
    """Backward induction on a pool: value V(s), draw value D(s) and bank b_s, s = 0..G."""

    value: np.ndarray
    draw_value: np.ndarray
    bank: np.ndarray
    targets: tuple[int, ...]

    @property
    def optimal_value(self) -> float:
        return float(self.value[0])


def pool_dynamic_programme(
    pool_size: int, pool_bad: int, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> PoolProgramme:
    """Solve the pool's stopping problem exactly (module docstring)."""
    if not gain > 0 or not 0.0 <= bust_keep <= 1.0:
        raise ValueError(f"gain must be > 0 and bust_keep in [0, 1], got {gain}, {bust_keep}")
    p = pool_chances(pool_size, pool_bad)
    good = len(p) - 1
    bank = start + gain * np.arange(good + 1, dtype=np.float64)
    value = np.empty(good + 1)
    draw_value = np.full(good + 1, -np.inf)
    value[good] = bank[good]
    for s in range(good - 1, -1, -1):
        draw_value[s] = p[s] * value[s + 1] + (1.0 - p[s]) * bust_keep * bank[s]
        value[s] = max(bank[s], draw_value[s])
    scale = np.maximum(1.0, np.abs(bank))
    first = int(np.flatnonzero(bank >= draw_value - _TIE_TOL * scale)[0])
    tied = first < good and abs(draw_value[first] - bank[first]) <= _TIE_TOL * scale[first]
    targets = (first, first + 1) if tied else (first,)
    return PoolProgramme(value, draw_value, bank, targets)


def pool_risk_neutral_benchmark(
    pool_size: int, pool_bad: int, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> tuple[float, float]:
    """(smallest optimal target, its expected bank) for the pool; (nan, nan) if invalid."""
    try:
        programme = pool_dynamic_programme(pool_size, pool_bad, gain, start, bust_keep)
    except ValueError:
        return math.nan, math.nan
    return float(programme.targets[0]), programme.optimal_value
