"""The continuous search on the prize, steered by d goal / d prize and d limit / d prize.

For one discrete setting the prize X lives in [lo, hi]. The grid (``grid_points`` prizes)
is the safeguard against several local optima: the search refines only the two grid cells
beside the best admissible grid prize x_b. In a cell [x_b, y] (either order):

1. Limits (KKT, one dimension). If y breaks a limit c_j(X) = quantity_j(X) - limit_j <= 0
   (bust rate, outlay), the boundary r_j with c_j(r_j) = 0 is found by a bracketed Newton
   iteration, X <- X - c_j(X) / c_j'(X) with c_j' by automatic differentiation, falling
   back to bisection whenever the step leaves the bracket; the iteration keeps the
   admissible end of its bracket, so the boundary point returned meets the limit exactly by
   the same certified prediction the candidates are judged on. A y whose prediction is
   uncertified is handled by bisection on admissibility. The cell shrinks to [x_b, e].
2. Goal. With f the score (goal, negated when minimised), f' by automatic differentiation:
   if f' changes sign from + to - across the cell, the stationary point f'(X*) = 0 is found
   by a bracketed secant iteration on f' (bisection fallback). The admissible end e is
   always a candidate too: when f' >= 0 at an upper boundary (or <= 0 at a lower one) the
   optimum sits on the limit and e is the KKT point (multiplier >= 0).

Each returned prize is then evaluated and certified like every grid point; the best
admissible evaluation wins, so the refinement can never do worse than the grid.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any

from stopwise.incentives_problem import DesignProblem, limits_hold, score

RowAt = Callable[[float], Mapping[str, Any]]
SlopesAt = Callable[[float], Mapping[str, tuple[float, float]]]
LIMITS = (("max_bust", "bust_rate", "bust"), ("budget", "prize_outlay", "outlay"))


def bracketed_newton(
    value: Callable[[float], float],
    slope: Callable[[float], float] | None,
    keep: float,
    other: float,
    steps: int,
    xtol: float,
) -> float:
    """A point on ``keep``'s side of a root of ``value`` (value(keep) <= 0 < value(other)),
    within about ``xtol`` of it. At most ``steps`` iterations: Newton x - v/v' from the
    newest point when ``slope`` is given, else the Illinois secant through the bracket's
    ends (the retained end's value halved when one end is kept twice); bisection whenever
    the step leaves the bracket. Newton may close in from the far side only, so the answer
    is the kept end or, nearer the root, the first of other - s (xtol, 10 xtol, ...) towards
    keep with value <= 0."""
    v_keep, v_other = value(keep), value(other)
    newest, v_newest, kept_last = other, v_other, 0
    for _ in range(steps):
        if abs(other - keep) <= xtol or v_keep == 0.0:
            break
        low, high = min(keep, other), max(keep, other)
        if slope is not None:
            d = slope(newest)
            step = newest - v_newest / d if d != 0.0 and math.isfinite(d) else math.nan
        else:
            step = keep - v_keep * (other - keep) / (v_other - v_keep)
        if not (math.isfinite(step) and low < step < high):
            step = 0.5 * (keep + other)
        v_step = value(step)
        if v_step <= 0.0:
            keep, v_keep = step, v_step
            v_other = v_other / 2.0 if kept_last == -1 else v_other
            kept_last = -1
        else:
            other, v_other = step, v_step
            v_keep = v_keep / 2.0 if kept_last == 1 else v_keep
            kept_last = 1
        newest, v_newest = step, v_step
    return _landing(value, keep, other, xtol)


def _landing(value: Callable[[float], float], keep: float, other: float, xtol: float) -> float:
    """keep, or the first point other - s * direction (s = xtol, 10 xtol, ... below the
    bracket width) with value <= 0: the admissible point nearest the root found."""
    width = abs(other - keep)
    direction = 1.0 if other > keep else -1.0
    offset = xtol
    while offset < width:
        trial = other - direction * offset
        if value(trial) <= 0.0:
            return trial
        offset *= 10.0
    return keep


def admissible_end(
    problem: DesignProblem, row_at: RowAt, slopes_at: SlopesAt, x_b: float, y: float, steps: int
) -> float:
    """The far end of the admissible part of [x_b, y] next to x_b (step 1 of the module
    docstring); x_b is admissible."""
    xtol = 1e-12 * max(1.0, abs(x_b), abs(y))
    row = row_at(y)
    if row["certified"] and limits_hold(problem, row):
        return y
    end = y
    for limit_name, column, quantity in LIMITS:
        limit = getattr(problem, limit_name)
        if limit is None or not row["certified"] or row[column] <= limit:
            continue

        def excess(x: float, column: str = column, limit: float = limit) -> float:
            found = row_at(x)
            return float(found[column]) - limit if found["certified"] else math.inf

        def excess_slope(x: float, quantity: str = quantity) -> float:
            return slopes_at(x)[quantity][1]

        root = bracketed_newton(excess, excess_slope, x_b, y, steps, xtol)
        end = root if abs(root - x_b) < abs(end - x_b) else end
    if end == y or not _admissible(problem, row_at(end)):  # uncertified or another limit

        def inadmissible(x: float) -> float:
            return -1.0 if _admissible(problem, row_at(x)) else 1.0

        end = bracketed_newton(inadmissible, None, x_b, end, steps, xtol)
    return end


def _admissible(problem: DesignProblem, row: Mapping[str, Any]) -> bool:
    return math.isfinite(score(problem, row))


def stationary_point(
    objective_slope: Callable[[float], float], a: float, b: float, steps: int
) -> float | None:
    """X* in (min, max) of [a, b] with objective_slope(X*) = 0 where the slope falls from
    positive to negative across the interval (a local maximum), by the bracketed secant
    iteration on the slope; None when the slope does not change sign that way."""
    low, high = min(a, b), max(a, b)
    s_low, s_high = objective_slope(low), objective_slope(high)
    if not (s_low > 0.0 > s_high):
        return None

    def negated(x: float) -> float:  # <= 0 on the low side of the maximum
        return -objective_slope(x)

    xtol = 1e-12 * max(1.0, abs(high))
    return bracketed_newton(negated, None, low, high, steps, xtol)


def refine_cell(
    problem: DesignProblem, row_at: RowAt, slopes_at: SlopesAt, x_b: float, y: float, steps: int
) -> list[float]:
    """Candidate prizes of one cell (module docstring): the admissible end and, if there is
    one, the stationary point of the score between x_b and that end."""
    end = admissible_end(problem, row_at, slopes_at, x_b, y, steps)
    sign = 1.0 if problem.goal == "efficiency" else -1.0

    def objective_slope(x: float) -> float:
        return sign * slopes_at(x)[problem.goal][1]

    found = stationary_point(objective_slope, x_b, end, steps) if end != x_b else None
    return [end] if found is None else [end, found]


def refine_setting(
    problem: DesignProblem,
    row_at: RowAt,
    slopes_at: SlopesAt,
    grid: list[float],
    scores: list[float],
) -> list[float]:
    """Candidate prizes from the two grid cells beside the best admissible grid prize; none
    when no grid prize is admissible."""
    best = max(range(len(grid)), key=lambda i: scores[i])
    if not math.isfinite(scores[best]) or problem.refine_steps == 0:
        return []
    found: list[float] = []
    for neighbour in (best - 1, best + 1):
        if 0 <= neighbour < len(grid):
            found += refine_cell(
                problem, row_at, slopes_at, grid[best], grid[neighbour], problem.refine_steps
            )
    return found
