"""Choosing survival chances, gains and the split of trials together, under a payout budget.

Candidate conditions are the pairs (p, g) of candidate survival chances and gains per
draw. Each is solved once for its information per trial I_(p,g)(theta_m) and its expected
payout per trial at the given values,

    E[bank kept | p, g] = sum_s R_s (1 - d_s) (start + s g)      (a bust keeps nothing),

exact over the decision paths (design_info). A design picks ``choose`` distinct conditions
and an allocation n_1..n_k of the T trials per participant (each n_j a positive multiple of
``step``, sum n_j = T; without a step the round-robin split); it carries

    I(design) = sum_j n_j I_(c_j),    payout(design) = sum_j n_j E[bank kept | c_j],

so every (set, allocation) is scored without solving the model again. Criteria as in
design_search: ``se:NAME`` minimises mean_m sqrt([I^-1]_NAME,NAME / N), ``d`` maximises
mean_m log det I. Designs over ``max_payout`` per participant and designs whose information
is singular at some point are dropped; the rest are ranked exhaustively (no heuristic: the
best design of the grid is found, tests compare it with a plan-by-plan computation).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import design_info as D
from stopwise.estimation.design_search import candidate_sets, criterion_parameter, criterion_values
from stopwise.estimation.design_study import MAX_TRUNCATED_MASS, Plan, range_points
from stopwise.models.base import Model

MAX_DESIGNS = 2_000_000
MAX_CONDITIONS = 200
CHUNK = 20_000


def allocations(trials: int, parts: int, step: int | None) -> np.ndarray:
    """Every (n_1..n_parts) with n_j a positive multiple of ``step`` and sum n_j = trials,
    shape (n_alloc, parts): the compositions of trials/step into ``parts`` positive parts.
    ``step`` None: the round-robin split only (trial t uses condition t mod k)."""
    if step is None:
        return D.trial_counts(parts, trials).astype(np.int64)[None, :]
    if step < 1 or trials % step:
        raise StopwiseInputError(
            f"allocation step {step}: expected a whole number >= 1 that divides the {trials} trials"
        )
    units = trials // step
    if units < parts:
        raise StopwiseInputError(
            f"{trials} trials in steps of {step} cannot give each of {parts} conditions a trial"
        )
    cuts = itertools.combinations(range(1, units), parts - 1)
    rows = [np.diff([0, *c, units]) for c in cuts]
    return step * np.array(rows, dtype=np.int64).reshape(-1, parts)


def payout_per_trial(tables: D.PathTables, gains: np.ndarray, start: float) -> np.ndarray:
    """E[bank kept] per point and condition (m, n_cond): sum_s R_s P(stop at s)(start + s g_c)."""
    steps = np.arange(tables.log_stop.shape[-1])
    stop_mass = np.exp(tables.log_reach + tables.log_stop)
    banks = start + gains[:, None] * steps[None, :]
    return np.einsum("mcs,cs->mc", stop_mass, banks)


def candidate_conditions(
    p_candidates: Sequence[float], gain_candidates: Sequence[float]
) -> tuple[np.ndarray, np.ndarray]:
    """Every pair (p, g): (chances, gains), each (n_cond,), p varying fastest within a gain."""
    if not p_candidates or not gain_candidates:
        raise StopwiseInputError("give at least one candidate chance and one candidate gain")
    if any(not 0 < p < 1 for p in p_candidates) or any(not g > 0 for g in gain_candidates):
        raise StopwiseInputError("candidates: expected chances in (0, 1) and gains > 0")
    grid = [(float(p), float(g)) for g in gain_candidates for p in p_candidates]
    if len(grid) > MAX_CONDITIONS:
        raise StopwiseInputError(
            f"{len(grid)} candidate conditions (over {MAX_CONDITIONS}): give fewer candidates"
        )
    p, g = zip(*grid)
    return np.array(p), np.array(g)


def design_information(per_trial: np.ndarray, sets: np.ndarray, allocs: np.ndarray) -> np.ndarray:
    """I for every (set, allocation): sum_j n_j I_(c_j), shape (m, n_sets * n_alloc, k, k),
    designs ordered set-major."""
    stacked = per_trial[:, sets]  # (m, n_sets, choose, k, k)
    out = np.einsum("aj,msjxy->msaxy", allocs.astype(float), stacked)
    return out.reshape(out.shape[0], -1, *out.shape[-2:])


@dataclass
class AllocationResult:
    """The best designs (one row each), the baseline row and what was dropped."""

    criterion: str
    baseline: dict[str, Any]
    table: pd.DataFrame
    n_designs: int
    dropped_budget: int
    dropped_singular: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "criterion": self.criterion,
            "baseline": self.baseline,
            "best": self.table.to_dict(orient="records"),
            "designs_scored": self.n_designs,
            "dropped_over_budget": self.dropped_budget,
            "dropped_not_identified": self.dropped_singular,
        }

    def summary(self) -> str:
        head = (
            f"Best chances, gains and trial splits by {self.criterion} ({self.n_designs} "
            f"designs scored, {self.dropped_budget} over budget, {self.dropped_singular} not "
            f"identified); baseline criterion {self.baseline['criterion']:.4g}, expected "
            f"payout {self.baseline['expected_payout']:.4g}"
        )
        return head + "\n" + self.table.to_string(index=False, float_format=lambda v: f"{v:.4g}")


def score_designs(
    per_trial: np.ndarray,
    payout: np.ndarray,
    sets: np.ndarray,
    allocs: np.ndarray,
    names: tuple[str, ...],
    criterion: str,
    scale: float,
) -> tuple[np.ndarray, np.ndarray]:
    """(criterion per design, payout per design), designs set-major, in chunks of sets."""
    values, payouts = [], []
    per_chunk = max(1, CHUNK // len(allocs))
    for first in range(0, len(sets), per_chunk):
        chunk = sets[first : first + per_chunk]
        info = design_information(per_trial, chunk, allocs)
        values.append(scale * criterion_values(info, names, criterion))
        payouts.append((payout[chunk] @ allocs.T.astype(float)).reshape(-1))
    return np.concatenate(values), np.concatenate(payouts)


def search_allocations(
    model: Model,
    theta: Mapping[str, float],
    baseline: Plan,
    p_candidates: Sequence[float],
    gain_candidates: Sequence[float],
    choose: int,
    step: int | None,
    criterion: str = "d",
    ranges: Mapping[str, tuple[float, float]] | None = None,
    best: int = 5,
    max_payout: float | None = None,
) -> AllocationResult:
    """Score every design of the grid (module docstring) for the baseline's trials and
    participants; return the ``best`` few with their gain over the baseline."""
    names = model.param_names
    if model.data_kind != "stopping":
        raise StopwiseInputError("choosing chances, gains and trial splits needs a solo model")
    if criterion != "d":
        criterion_parameter(criterion, names)
    points = range_points(theta, ranges or {})
    cand_p, cand_g = candidate_conditions(p_candidates, gain_candidates)
    all_p = np.concatenate([cand_p, baseline.p_survive])
    all_g = np.concatenate([cand_g, baseline.condition_gains()])
    tables = D.path_tables(model, points, tuple(all_p), all_g, baseline.start)
    if float(np.max(tables.truncated_mass)) > MAX_TRUNCATED_MASS:
        raise StopwiseInputError("the largest candidate chance leaves path mass beyond the cap")
    per_trial = D.condition_information(tables)
    payout = payout_per_trial(tables, all_g, baseline.start)[0]
    sets = candidate_sets(len(cand_p), choose)
    allocs = allocations(baseline.trials, choose, step)
    if len(sets) * len(allocs) > MAX_DESIGNS:
        raise StopwiseInputError(
            f"{len(sets) * len(allocs)} designs (over {MAX_DESIGNS}): give fewer candidates, "
            "a smaller choice or a coarser allocation step"
        )
    scale = 1.0 if criterion == "d" else 1 / math.sqrt(baseline.subjects)
    values, payouts = score_designs(per_trial, payout, sets, allocs, names, criterion, scale)
    over = np.zeros(len(values), bool) if max_payout is None else payouts > max_payout
    singular = np.isnan(values)
    keep = np.flatnonzero(~over & ~singular)
    base_idx = np.arange(len(cand_p), len(all_p))[None, :]
    base_alloc = baseline.condition_counts()[None, :]
    base_info = design_information(per_trial, base_idx, base_alloc)
    base_value = scale * float(criterion_values(base_info, names, criterion)[0])
    order = keep[np.argsort(values[keep], kind="stable")][:best]
    rows = []
    for i in order:
        chosen, alloc = sets[i // len(allocs)], allocs[i % len(allocs)]
        ratio = se_ratio(values[i], base_value, criterion, len(names))
        rows.append(
            {
                "p_survive": " ".join(f"{cand_p[j]:g}" for j in chosen),
                "gain": " ".join(f"{cand_g[j]:g}" for j in chosen),
                "trials": " ".join(str(int(n)) for n in alloc),
                "criterion": float(values[i]),
                "se_gain": ratio,
                "participants_share": 1 / ratio**2,
                "expected_payout": float(payouts[i]),
            }
        )
    baseline_row = {
        "p_survive": list(baseline.p_survive),
        "gain": baseline.condition_gains().tolist(),
        "trials": baseline.condition_counts().astype(int).tolist(),
        "criterion": base_value,
        "expected_payout": float(payout[len(cand_p) :] @ baseline.condition_counts()),
    }
    return AllocationResult(
        criterion,
        baseline_row,
        pd.DataFrame(rows),
        len(values),
        int(over.sum()),
        int(singular.sum()),
    )


def se_ratio(value: float, base_value: float, criterion: str, n_params: int) -> float:
    """SE_baseline / SE_design; for D the geometric-mean ratio
    exp((logdet_design - logdet_baseline) / (2k)) (criterion values are -logdet)."""
    if criterion == "d":
        return math.exp((base_value - value) / (2 * n_params))
    return base_value / value
