"""Choosing survival chances: the best few sets of ``choose`` chances among candidates.

Each candidate chance c is solved once for the information per trial I_c(theta_m) at every
parameter point (design_info, exact over decision paths). A set {c_1..c_k} played over T
trials (trial t uses c_(t mod k)) carries I(S) = sum_j n_j I_(c_j), so every set is scored
without solving the model again. Criteria, averaged over the parameter points (pseudo-
Bayesian design):

    se:NAME   minimise mean_m sqrt([I(S; theta_m)^-1]_NAME,NAME / N)   (SE of NAME, N
              participants pooled)
    d         maximise mean_m log det I(S; theta_m)                 (D-optimality)

A budget on the expected payout per participant (at the given values),
sum_j n_j E[bank kept | c_j] with E[bank kept | c] = sum_s R_s (1 - d_s)(start + s gain),
drops the sets that exceed it. Sets whose information is singular at some point are dropped.
The gain over the baseline is SE_baseline / SE_best (or exp of the log det difference per
parameter for D), and the participants needed for the baseline's precision shrink by its
square.
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
from stopwise.estimation.design_study import Plan, range_points
from stopwise.models.base import Model

MAX_SETS = 250_000


def expected_payout_per_trial(tables: D.PathTables, gain: float, start: float) -> np.ndarray:
    """E[bank kept] per point and condition (m, n_cond): sum_s R_s P(stop at s)(start + s g);
    a bust keeps nothing (bust_keep 0)."""
    steps = np.arange(tables.log_stop.shape[-1])
    stop_mass = np.exp(tables.log_reach + tables.log_stop)
    return np.einsum("mcs,s->mc", stop_mass, start + steps * gain)


def candidate_sets(n_candidates: int, choose: int) -> np.ndarray:
    """All sets of ``choose`` distinct candidates, (n_sets, choose), in increasing order."""
    if not 1 <= choose <= n_candidates:
        raise StopwiseInputError(
            f"--choose {choose}: give between 1 and the number of candidates ({n_candidates})"
        )
    n_sets = math.comb(n_candidates, choose)
    if n_sets > MAX_SETS:
        raise StopwiseInputError(
            f"{n_sets} candidate sets (over {MAX_SETS}): give fewer candidates or a smaller "
            "--choose"
        )
    return np.array(list(itertools.combinations(range(n_candidates), choose)), dtype=int)


def set_information(per_trial: np.ndarray, sets: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """I(S) = sum_j n_j I_(c_j), shape (m, n_sets, k, k)."""
    return np.einsum("j,msjab->msab", counts, per_trial[:, sets])


def criterion_values(info: np.ndarray, names: tuple[str, ...], criterion: str) -> np.ndarray:
    """Per set, the criterion averaged over points (lower is better; D is returned negated,
    -mean log det). NaN where the information is singular at some point."""
    sign, logdet = np.linalg.slogdet(info)
    singular = np.any(sign <= 0, axis=0)
    if criterion == "d":
        value = -np.mean(logdet, axis=0)
    else:
        index = names.index(criterion_parameter(criterion, names))
        safe = np.where((sign > 0)[..., None, None], info, np.eye(info.shape[-1]))
        value = np.mean(np.sqrt(np.abs(np.linalg.inv(safe)[..., index, index])), axis=0)
    return np.where(singular, np.nan, value)


def criterion_parameter(criterion: str, names: tuple[str, ...]) -> str:
    """'se:r' -> 'r' (checked against the model's parameters)."""
    kind, _, name = criterion.partition(":")
    if kind != "se" or name not in names:
        raise StopwiseInputError(
            f"criterion {criterion!r}: expected 'd' or 'se:NAME' with NAME one of "
            f"{', '.join(names)}"
        )
    return name


@dataclass
class SearchResult:
    """The best sets, the baseline and the gain; ``table`` has one row per set."""

    criterion: str
    baseline: dict[str, Any]
    table: pd.DataFrame
    n_sets: int
    dropped_budget: int
    dropped_singular: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "criterion": self.criterion,
            "baseline": self.baseline,
            "best": self.table.to_dict(orient="records"),
            "sets_scored": self.n_sets,
            "dropped_over_budget": self.dropped_budget,
            "dropped_not_identified": self.dropped_singular,
        }

    def summary(self) -> str:
        head = (
            f"Best designs by {self.criterion} ({self.n_sets} sets scored, "
            f"{self.dropped_budget} over budget, {self.dropped_singular} not identified); "
            f"baseline {self.baseline['p_survive']}: criterion {self.baseline['criterion']:.4g}"
        )
        return head + "\n" + self.table.to_string(index=False, float_format=lambda v: f"{v:.4g}")


def search_designs(
    model: Model,
    theta: Mapping[str, float],
    baseline: Plan,
    candidates: Sequence[float],
    choose: int,
    criterion: str = "d",
    ranges: Mapping[str, tuple[float, float]] | None = None,
    best: int = 5,
    max_payout: float | None = None,
) -> SearchResult:
    """Score every set of ``choose`` candidate chances for the baseline's trials (module
    docstring) and return the ``best`` few with their gain over the baseline."""
    names = model.param_names
    if criterion != "d":
        criterion_parameter(criterion, names)
    points = range_points(theta, ranges or {})
    all_p = tuple(candidates) + tuple(baseline.p_survive)
    tables = D.path_tables(model, points, all_p, baseline.gain, baseline.start)
    per_trial = D.condition_information(tables)
    payout = expected_payout_per_trial(tables, baseline.gain, baseline.start)[0]
    if float(np.max(tables.truncated_mass)) > 1e-8:
        raise StopwiseInputError("the largest candidate chance leaves path mass beyond the cap")
    n_cand = len(candidates)
    sets = candidate_sets(n_cand, choose)
    counts = D.trial_counts(choose, baseline.trials)
    scale = 1.0 if criterion == "d" else 1 / math.sqrt(baseline.subjects)
    values = scale * criterion_values(set_information(per_trial, sets, counts), names, criterion)
    set_payout = payout[sets] @ counts
    over = np.zeros(len(sets), bool) if max_payout is None else set_payout > max_payout
    singular = np.isnan(values)
    keep = np.flatnonzero(~over & ~singular)
    base_sets = np.arange(n_cand, len(all_p))[None, :]
    base_counts = D.trial_counts(len(baseline.p_survive), baseline.trials)
    base_info = set_information(per_trial, base_sets, base_counts)
    base_value = scale * float(criterion_values(base_info, names, criterion)[0])
    order = keep[np.argsort(values[keep], kind="stable")][:best]
    rows = [
        _set_row(candidates, sets[i], values[i], base_value, set_payout[i], criterion, len(names))
        for i in order
    ]
    baseline_row = {
        "p_survive": list(baseline.p_survive),
        "criterion": base_value,
        "expected_payout": float(payout[n_cand:] @ base_counts),
    }
    return SearchResult(
        criterion, baseline_row, pd.DataFrame(rows), len(sets), int(over.sum()), int(singular.sum())
    )


def _set_row(
    candidates: Sequence[float],
    chosen: np.ndarray,
    value: float,
    base_value: float,
    payout: float,
    criterion: str,
    n_params: int,
) -> dict[str, Any]:
    """One table row: the chances, the criterion, the SE ratio to the baseline (for D the
    geometric-mean SE ratio exp((logdet_best - logdet_base) / (2k))), the share of
    participants needed for the baseline's precision (1 / ratio^2) and the payout."""
    if criterion == "d":
        se_ratio = math.exp((base_value - value) / (2 * n_params))
    else:
        se_ratio = base_value / value
    return {
        "p_survive": " ".join(f"{candidates[j]:g}" for j in chosen),
        "criterion": float(value),
        "se_gain": se_ratio,
        "participants_share": 1 / se_ratio**2,
        "expected_payout": float(payout),
    }
