"""Risk-neutral benchmarks of the draw-again-or-stop task (numpy/scipy only).

Task: the bank starts at ``start``; each draw succeeds with probability p and adds ``gain``;
a failed draw (a bust) ends the trial and pays ``bust_keep`` times the bank held before that
draw. A *target* n means: draw until n draws have succeeded, then stop. With b_i = s + i g,

    E[bank | n] = p^n b_n + sum_{i=0}^{n-1} p^i (1 - p) k b_i
                = p^n (s + n g) + k [ s (1 - p^n) + g p (1 - n p^(n-1) + (n-1) p^n) / (1 - p) ].

Drawing at bank b beats stopping iff p (b + g) + (1 - p) k b > b, i.e. iff
b < c = p g / ((1 - p) (1 - k)); the problem is monotone, so this one-step look-ahead rule is
optimal (Chow, Robbins & Siegmund 1971, monotone case; from memory). With start 0 and k = 0,
c = p g / (1 - p): draw while bank < p * gain / (1 - p). At b = c drawing and stopping tie,
so targets m and m + 1 tie when (c - s) / g = m is a whole number (p = 0.9, g = 1: 9 and 10).
``dynamic_programme`` finds the rule independently by backward induction.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

_TIE_TOL = 1e-9


def _check_task(p_survive: float, gain: float, bust_keep: float) -> None:
    if not 0.0 < p_survive < 1.0:
        raise ValueError(f"p_survive must lie strictly between 0 and 1, got {p_survive}")
    if not gain > 0.0:
        raise ValueError(f"gain must be > 0, got {gain}")
    if not 0.0 <= bust_keep <= 1.0:
        raise ValueError(f"bust_keep must lie in [0, 1], got {bust_keep}")


def expected_bank(
    target: int | np.ndarray,
    p_survive: float,
    gain: float,
    start: float = 0.0,
    bust_keep: float = 0.0,
) -> np.ndarray:
    """E[bank | target n] in closed form (module docstring); vectorised over ``target``."""
    _check_task(p_survive, gain, bust_keep)
    n = np.asarray(target, dtype=np.float64)
    p, s, g, k = p_survive, start, gain, bust_keep
    pn = np.power(p, n)
    kept_on_bust = s * (1.0 - pn) + g * p * (1.0 - n * np.power(p, n - 1.0) + (n - 1.0) * pn) / (
        1.0 - p
    )
    return pn * (s + n * g) + k * kept_on_bust


def draw_threshold(p_survive: float, gain: float, bust_keep: float = 0.0) -> float:
    """c = p g / ((1 - p)(1 - k)): drawing is strictly better while the bank is below c
    (infinite when k = 1)."""
    _check_task(p_survive, gain, bust_keep)
    if bust_keep >= 1.0:
        return math.inf
    return p_survive * gain / ((1.0 - p_survive) * (1.0 - bust_keep))


def optimal_targets(
    p_survive: float, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> tuple[int, ...]:
    """Every risk-neutral optimal target from the threshold rule: m = ceil((c - s) / g)
    (0 if c <= s); (m, m + 1) when (c - s) / g = m exactly (a tie)."""
    c = draw_threshold(p_survive, gain, bust_keep)
    if math.isinf(c):
        raise ValueError("with bust_keep = 1 a bust costs nothing: no finite optimal target")
    ratio = (c - start) / gain
    if ratio <= 0.0:
        return (0,) if ratio < -_TIE_TOL else (0, 1)
    nearest = round(ratio)
    if abs(ratio - nearest) <= _TIE_TOL * max(1.0, abs(ratio)):
        return (int(nearest), int(nearest) + 1)
    return (math.ceil(ratio),)


def optimal_target(
    p_survive: float, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> int:
    """The smallest risk-neutral optimal target (see ``optimal_targets``)."""
    return optimal_targets(p_survive, gain, start, bust_keep)[0]


def default_max_target(
    p_survive: float, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> int:
    """A cap well past the optimum: twice the optimal target plus 10."""
    return 2 * optimal_target(p_survive, gain, start, bust_keep) + 10


def expected_bank_curve(
    p_survive: float,
    gain: float,
    start: float = 0.0,
    bust_keep: float = 0.0,
    max_target: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Targets 0..max_target and E[bank | target] for each (closed form)."""
    if max_target is None:
        max_target = default_max_target(p_survive, gain, start, bust_keep)
    targets = np.arange(int(max_target) + 1)
    return targets, expected_bank(targets, p_survive, gain, start, bust_keep)


def best_targets_on_curve(values: np.ndarray, rtol: float = 1e-12) -> tuple[int, ...]:
    """Indices attaining the maximum of an expected-bank curve (ties within ``rtol``)."""
    values = np.asarray(values, dtype=np.float64)
    best = float(values.max())
    close = np.flatnonzero(values >= best - rtol * max(1.0, abs(best)))
    return tuple(int(i) for i in close)


@dataclass(frozen=True)
class DynamicProgramme:
    """Backward induction over steps 0..horizon (forced stop at the horizon).

    value[i] = max(b_i, p value[i+1] + (1 - p) k b_i),  value[horizon] = b_horizon.
    ``targets``: the step(s) where the optimal policy started at step 0 first stops
    (two when drawing and stopping tie there).
    """

    value: np.ndarray
    draw_value: np.ndarray
    stop_value: np.ndarray
    targets: tuple[int, ...]

    @property
    def optimal_value(self) -> float:
        return float(self.value[0])


def dynamic_programme(
    p_survive: float,
    gain: float,
    start: float = 0.0,
    bust_keep: float = 0.0,
    horizon: int | None = None,
) -> DynamicProgramme:
    """Solve the stopping problem by brute-force backward induction (no closed form used).
    The default horizon is where p^horizon < 1e-18, beyond which nothing matters."""
    _check_task(p_survive, gain, bust_keep)
    if horizon is None:
        horizon = min(math.ceil(math.log(1e-18) / math.log(p_survive)) + 10, 100_000)
    bank = start + gain * np.arange(horizon + 1, dtype=np.float64)
    value = np.empty(horizon + 1)
    draw_value = np.full(horizon + 1, -np.inf)
    value[horizon] = bank[horizon]
    for i in range(horizon - 1, -1, -1):
        draw_value[i] = p_survive * value[i + 1] + (1.0 - p_survive) * bust_keep * bank[i]
        value[i] = max(bank[i], draw_value[i])
    scale = np.maximum(1.0, np.abs(bank))
    stops = np.flatnonzero(bank >= draw_value - _TIE_TOL * scale)
    first = int(stops[0])
    tied = abs(draw_value[first] - bank[first]) <= _TIE_TOL * scale[first]
    targets = (first, first + 1) if tied and first < horizon else (first,)
    return DynamicProgramme(value, draw_value, bank, targets)


def outcome_distribution(
    target: int, p_survive: float, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """Final banks and their probabilities under target n: k b_i with p^i (1 - p) for a bust
    at step i < n, and b_n with p^n."""
    _check_task(p_survive, gain, bust_keep)
    steps = np.arange(int(target) + 1, dtype=np.float64)
    bank = start + gain * steps
    values = np.concatenate([bust_keep * bank[:-1], bank[-1:]])
    probs = np.concatenate(
        [
            np.power(p_survive, steps[:-1]) * (1.0 - p_survive),
            [p_survive ** int(target)],
        ]
    )
    return values, probs


def certainty_equivalent(
    target: int,
    p_survive: float,
    gain: float,
    utility: Callable[[float], float],
    start: float = 0.0,
    bust_keep: float = 0.0,
) -> float:
    """The sure bank x with u(x) = E[u(bank) | target n], for an increasing ``utility``,
    found by root finding (Brent) between the smallest and largest final bank."""
    values, probs = outcome_distribution(target, p_survive, gain, start, bust_keep)
    keep = probs > 0.0
    values, probs = values[keep], probs[keep]
    low, high = float(values.min()), float(values.max())
    if high - low <= 0.0:
        return low
    utils = np.array([float(utility(float(x))) for x in values])
    if np.any(np.isnan(utils)):
        raise ValueError("utility returned NaN for a possible final bank")
    with np.errstate(invalid="ignore"):
        expected = float(np.sum(np.where(probs > 0, probs * utils, 0.0)))
    if expected == -math.inf:
        return low
    u_low, u_high = float(utility(low)), float(utility(high))
    if not u_low < u_high:
        raise ValueError("utility must be increasing over the possible final banks")
    if expected <= u_low:
        return low
    if expected >= u_high:
        return high
    return float(brentq(lambda x: float(utility(x)) - expected, low, high, xtol=1e-12, rtol=1e-14))


def risk_neutral_benchmark(
    p_survive: float, gain: float, start: float = 0.0, bust_keep: float = 0.0
) -> tuple[float, float]:
    """(smallest optimal target, its expected bank); (nan, nan) when none is finite."""
    try:
        n = optimal_target(p_survive, gain, start, bust_keep)
    except ValueError:
        return math.nan, math.nan
    return float(n), float(expected_bank(n, p_survive, gain, start, bust_keep))
