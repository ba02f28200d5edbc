"""Incentive design from fitted behaviour: the contest scheme that best serves a stated goal
for the players a fit describes, within stated limits (``design_incentives``).

Goals, limits and schemes: stopwise.incentives_problem. Every candidate design d = (players
N, scheme, prize X, p_survive p) is evaluated by ``stopwise.contest_counterfactual``: the
fitted model's symmetric play sigma_d and Nash play, each with its certificate.
Search: discrete settings (players, scheme, p_survive) by enumeration; the prize by a grid
of ``grid_points`` over [lo, hi] (the safeguard against several optima), then a search
steered by d goal / d prize and d limit / d prize (automatic differentiation through the
fitted play) in the two grid cells beside the best grid prize: bracketed Newton to a limit's
boundary, bracketed secant to a stationary point (stopwise.incentives_search).
An uncertified or inadmissible evaluation scores -inf and is never chosen. Uncertainty of
the chosen design: delta method and parametric bootstrap over the fit's full covariance
(stopwise.incentives_uncertainty).

Predictions are research estimates for designing experiments, not decisions about people.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from stopwise.contest_counterfactual import counterfactual, model_row
from stopwise.incentives_gradient import prize_derivative, prize_slopes
from stopwise.incentives_problem import (
    DesignProblem,
    check_problem,
    design_setting,
    goal_value,
    scheme_applies,
    scheme_terms,
    score,
)
from stopwise.incentives_search import refine_setting
from stopwise.incentives_uncertainty import (
    bootstrap,
    delta_method,
    design_predictor,
    parameter_uncertainty,
)

SEARCH_METHOD = (
    "enumeration over players x scheme x p_survive; prize: grid, then in the two grid cells "
    "beside the best grid prize a bracketed Newton iteration to a limit's boundary and a "
    "bracketed secant iteration to d goal / d prize = 0 (derivatives by automatic "
    "differentiation through the fitted play); every candidate certified"
)


class NoAdmissibleDesign(Exception):
    """No candidate is both certified and within the limits."""


@dataclass
class DesignResult:
    """``choice``: the chosen design with model and Nash predictions and uncertainty;
    ``runners_up``: the best admissible design of every other discrete setting;
    ``candidates``: every evaluation (one row per design and prediction)."""

    problem: DesignProblem
    choice: dict[str, Any]
    runners_up: list[dict[str, Any]]
    candidates: pd.DataFrame
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        p = self.problem
        return {
            "goal": p.goal,
            "limits": {
                "prize": list(p.prize_range),
                "players": list(p.players),
                "schemes": list(p.schemes),
                "p_survive": list(p.p_survive),
                "max_bust": p.max_bust,
                "budget": p.budget,
                "target_risk": p.target_risk,
            },
            "method": SEARCH_METHOD,
            "choice": self.choice,
            "runners_up": self.runners_up,
            "candidates": self.candidates.to_dict(orient="records"),
            "certified": True,
            "notes": self.notes,
        }


Evaluator = Callable[[int, str, float, float], dict[str, dict[str, Any]]]
RowEvaluator = Callable[[int, str, float, float], dict[str, Any]]
Refiner = Callable[[DesignProblem, int, str, float, list[float], list[float]], list[float]]


def counterfactual_evaluator(fit_input: Any, tolerance: float = 1e-6) -> Evaluator:
    """evaluate(players, scheme, prize, p_survive) -> {"model": row, "nash": row}, rows of
    ``counterfactual`` (uncertified rows kept, marked, never chosen), with memoisation."""
    cache: dict[tuple[int, str, float, float], dict[str, dict[str, Any]]] = {}

    def evaluate(players: int, scheme: str, prize: float, p_survive: float):
        key = (players, scheme, float(prize), float(p_survive))
        if key not in cache:
            setting = design_setting(players, scheme, prize, p_survive)
            table = counterfactual(
                fit_input, [setting], tolerance=tolerance, allow_approximate=True
            ).table
            rows = table.to_dict(orient="records")
            for row in rows:
                row["scheme_kind"] = scheme
            cache[key] = {"nash": rows[0], "model": rows[1]}
        return cache[key]

    return evaluate


def model_evaluator(fit_input: Any, tolerance: float = 1e-6) -> RowEvaluator:
    """evaluate(players, scheme, prize, p_survive) -> the model's row alone (the same numbers
    and certificate as ``counterfactual_evaluator``'s "model" row, no Nash solve)."""

    def evaluate(players: int, scheme: str, prize: float, p_survive: float) -> dict[str, Any]:
        return model_row(fit_input, design_setting(players, scheme, prize, p_survive), tolerance)

    return evaluate


def gradient_refiner(fit_input: dict[str, Any], tolerance: float = 1e-6) -> Refiner:
    """refine(problem, players, scheme, p, grid, scores) -> extra prizes to evaluate, by the
    derivative-steered search of stopwise.incentives_search (values and limits from the
    certified model rows, slopes by automatic differentiation at the rows' cap)."""
    rows = model_evaluator(fit_input, tolerance)

    def refine(problem, players, scheme, p_survive, grid, scores) -> list[float]:
        def row_at(x: float) -> dict[str, Any]:
            return rows(players, scheme, x, p_survive)

        cap = int(row_at(grid[0])["cap"])
        keep, top_k = scheme_terms(scheme)
        slopes_at = prize_slopes(
            fit_input["model"],
            fit_input["params"],
            (players, keep, p_survive, cap, top_k),
            problem.target_risk,
        )
        return refine_setting(problem, row_at, slopes_at, grid, scores)

    return refine


def candidate_frame(
    problem: DesignProblem, evaluate: Evaluator, visited: Sequence[tuple[int, str, float, float]]
) -> pd.DataFrame:
    """One row per visited design and prediction with its goal value, score and whether it
    is admissible (certified and within the limits; judged on the model's prediction)."""
    records = []
    for players, scheme, prize, p in visited:
        pair = evaluate(players, scheme, prize, p)
        admissible = math.isfinite(score(problem, pair["model"]))
        for label, row in (("model", pair["model"]), ("nash", pair["nash"])):
            records.append(
                {
                    "players": players,
                    "scheme": scheme,
                    "prize": prize,
                    "p_survive": p,
                    "cap": int(row["cap"]),
                    "prediction": label,
                    "goal_value": goal_value(problem.goal, row, problem.target_risk),
                    "bust_rate": row["bust_rate"],
                    "expected_bank": row["expected_bank"],
                    "mean_target": row["mean_target"],
                    "prize_outlay": row["prize_outlay"],
                    "max_regret": row["max_regret"],
                    "check": row["check"],
                    "certified": bool(row["certified"]),
                    "admissible": admissible if label == "model" else None,
                    "score": score(problem, pair["model"]) if label == "model" else None,
                }
            )
    return pd.DataFrame(records)


def best_per_setting(model_rows: pd.DataFrame) -> pd.DataFrame:
    """The best admissible row of each discrete setting, best first (ties: smaller prize)."""
    ok = model_rows[model_rows["admissible"].astype(bool)]
    ordered = ok.sort_values(["score", "prize"], ascending=[False, True], kind="stable")
    best = ordered.groupby(["players", "scheme", "p_survive"], sort=False).head(1)
    return best.reset_index(drop=True)


def prize_grid(problem: DesignProblem) -> list[float]:
    """``grid_points`` evenly spaced prizes over the range (one prize when LO = HI)."""
    lo, hi = problem.prize_range
    return [float(x) for x in np.linspace(lo, hi, problem.grid_points)] if hi > lo else [lo]


def search(
    problem: DesignProblem, evaluate: Evaluator, refine: Refiner | None = None
) -> pd.DataFrame:
    """Every evaluation of the search (candidate_frame): the discrete settings enumerated
    (a topK scheme only with more than K players), each setting's prize grid, and the
    prizes ``refine`` proposes from the grid's scores."""
    visited = []
    for players in problem.players:
        for scheme in [s for s in problem.schemes if scheme_applies(s, players)]:
            for p in problem.p_survive:
                grid = prize_grid(problem)
                scores = [score(problem, evaluate(players, scheme, x, p)["model"]) for x in grid]
                extra = refine(problem, players, scheme, p, grid, scores) if refine else []
                visited.extend((players, scheme, x, p) for x in dict.fromkeys(grid + extra))
    return candidate_frame(problem, evaluate, visited)


def design_incentives(
    fit: Any,
    goal: str,
    prize: tuple[float, float],
    players: Sequence[int] = (2,),
    schemes: Sequence[str] = ("winner", "keep"),
    p_survive: Sequence[float] = (0.8,),
    max_bust: float | None = None,
    budget: float | None = None,
    target_risk: float | None = None,
    grid_points: int = 9,
    refine_steps: int = 30,
    bootstrap_draws: int = 0,
    seed: int = 0,
    tolerance: float = 1e-6,
) -> DesignResult:
    """The admissible design that best serves ``goal`` for the fitted players (module
    docstring: goals, limits, search, uncertainty). Raises NoAdmissibleDesign when no
    certified candidate meets the limits; StopwiseInputError for a malformed problem."""
    problem = DesignProblem(
        goal,
        (float(prize[0]), float(prize[1])),
        tuple(int(n) for n in players),
        tuple(schemes),
        tuple(float(p) for p in p_survive),
        max_bust,
        budget,
        target_risk,
        int(grid_points),
        int(refine_steps),
    )
    check_problem(problem)
    base, uncertainty, notes = parameter_uncertainty(fit)
    refine = gradient_refiner(base, tolerance) if refine_steps else None
    candidates = search(problem, counterfactual_evaluator(base, tolerance), refine)
    model_rows = candidates[candidates["prediction"] == "model"]
    best = best_per_setting(model_rows)
    uncertified = int((~candidates["certified"]).sum())
    if best.empty:
        raise NoAdmissibleDesign(
            f"no candidate design is certified and within the limits ({len(model_rows)} "
            f"evaluated, {uncertified} predictions uncertified); widen the limits"
        )
    choice = describe_design(candidates, best.iloc[0])
    design = (int(choice["players"]), choice["scheme"], choice["prize"], choice["p_survive"])
    predict = design_predictor(base, design, tolerance)
    choice["delta_method"] = delta_method(problem, predict, uncertainty) if uncertainty else None
    if bootstrap_draws and uncertainty:
        choice["bootstrap"] = bootstrap(problem, predict, uncertainty, bootstrap_draws, seed)
    keep, top_k = scheme_terms(design[1])
    play = (design[0], keep, design[3], int(best.iloc[0]["cap"]), top_k)
    choice["prize_derivative"] = prize_derivative(
        base["model"], base["params"], goal, play, design[2], target_risk
    )
    if max_bust is not None:  # how fast the limited quantity moves with the prize
        choice["bust_rate_derivative"] = prize_derivative(
            base["model"], base["params"], "bust", play, design[2]
        )
    runners_up = [describe_design(candidates, row) for _, row in best.iloc[1:].iterrows()]
    if uncertainty is None:
        notes.append("the fit carries no standard errors: no uncertainty")
    else:
        notes.append(f"uncertainty from the {uncertainty.source}")
    if uncertified:
        notes.append(f"{uncertified} uncertified predictions were never chosen")
    return DesignResult(problem, choice, runners_up, candidates, notes)


def describe_design(candidates: pd.DataFrame, chosen: pd.Series) -> dict[str, Any]:
    """A design with its model prediction and the Nash prediction beside it."""
    same = (
        (candidates["players"] == chosen["players"])
        & (candidates["scheme"] == chosen["scheme"])
        & (candidates["prize"] == chosen["prize"])
        & (candidates["p_survive"] == chosen["p_survive"])
    )
    keys = (
        "goal_value",
        "bust_rate",
        "expected_bank",
        "mean_target",
        "prize_outlay",
        "max_regret",
        "check",
        "certified",
    )
    nash = candidates[same & (candidates["prediction"] == "nash")].iloc[0]
    return {
        "players": int(chosen["players"]),
        "scheme": str(chosen["scheme"]),
        "prize": float(chosen["prize"]),
        "p_survive": float(chosen["p_survive"]),
        "model": {k: _plain(chosen[k]) for k in keys},
        "nash": {k: _plain(nash[k]) for k in keys},
    }


def _plain(value: Any) -> Any:
    return value.item() if hasattr(value, "item") else value
