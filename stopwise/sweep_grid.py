"""Grids of a sweep of contest equilibria: parsing "LO:HI:STEP" and "X,Y,Z", the order of
the settings, and the total variation distance between neighbouring answers."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError

GRID_LIMIT = 100_000


def parse_grid(text: str, name: str) -> list[float]:
    """Values of a grid option: "X", "X,Y,Z" or "LO:HI:STEP" (LO, LO+STEP, ... up to HI
    inclusive, HI reached within 1e-9 of a step)."""
    text = text.strip()
    where = f"--{name.replace('_', '-')} {text!r}"
    if ":" in text:
        parts = text.split(":")
        if len(parts) != 3:
            raise StopwiseInputError(f"{where}: expected LO:HI:STEP, e.g. 0.80:0.95:0.001")
        lo, hi, step = (_number(v, where) for v in parts)
        if not step > 0 or hi < lo:
            raise StopwiseInputError(f"{where}: expected STEP > 0 and LO <= HI")
        count = math.floor((hi - lo) / step + 1e-9) + 1
        if count > GRID_LIMIT:
            raise StopwiseInputError(f"{where}: {count} points exceed the limit {GRID_LIMIT}")
        return [round(lo + k * step, 12) for k in range(count)]
    values = [_number(v, where) for v in text.split(",")]
    if len(set(values)) != len(values):
        raise StopwiseInputError(f"{where}: a value is repeated")
    return values


def _number(value: str, where: str) -> float:
    try:
        number = float(value)
    except ValueError:
        raise StopwiseInputError(f"{where}: {value!r} is not a number") from None
    if not math.isfinite(number):
        raise StopwiseInputError(f"{where}: {value!r} is not a finite number")
    return number


def check_grid(p_values: Sequence[float], prizes: Sequence[float]) -> None:
    """Every p in (0, 1), every prize > 0, at least one value each."""
    if not p_values or not prizes:
        raise StopwiseInputError("a sweep needs at least one p_survive and one prize")
    for p in p_values:
        if not 0.0 < p < 1.0:
            raise StopwiseInputError(f"p_survive must lie strictly between 0 and 1, got {p}")
    for prize in prizes:
        if not prize > 0:
            raise StopwiseInputError(f"prize must be positive, got {prize}")


def grid_settings(
    p_values: Sequence[float], prizes: Sequence[float]
) -> tuple[str, list[tuple[float, float]]]:
    """The swept axis (p_survive if it has several values, else prize) and the settings
    (p, prize) with the swept axis running fastest."""
    if len(p_values) > 1 or len(prizes) == 1:
        return "p_survive", [(p, x) for x in prizes for p in p_values]
    return "prize", [(p, x) for p in p_values for x in prizes]


def grid_lines(axis: str, points: list[tuple[float, float]]) -> list[list[tuple[float, float]]]:
    """The grid's lines: consecutive settings that share the value of the axis not swept
    (each line is warm-started along the swept axis, independently of the others)."""
    other = 1 if axis == "p_survive" else 0
    lines: list[list[tuple[float, float]]] = []
    for point in points:
        if lines and lines[-1][-1][other] == point[other]:
            lines[-1].append(point)
        else:
            lines.append([point])
    return lines


def total_variation(a: np.ndarray, b: np.ndarray) -> float:
    """(1/2) sum_t |a_t - b_t|."""
    return 0.5 * float(np.abs(a - b).sum())
