"""Incentive design from fitted behaviour: the contest scheme that best serves a stated goal
for the players a fit describes, within stated limits (``design_incentives``).

Every candidate design d = (players N, scheme, prize X, p_survive p) is evaluated by
``stopwise.contest_counterfactual.counterfactual``: the fitted model's symmetric play sigma_d
and Nash play, each with its certificate. Goals, on the model's prediction:

    efficiency: maximise  N * E[bank | sigma_d]          (expected total bank of a group)
    bust:       minimise  P(bust | sigma_d) = sum_t sigma_d(t) (1 - p^t)
    risk:       minimise  |sum_t t sigma_d(t) - target_risk|   (reach a mean target)
    outlay:     minimise  X + keep * N * E[bank | sigma_d]     subject to --max-bust

Limits: P(bust | sigma_d) <= max_bust, outlay <= budget (expected prize outlay per group).
Search: discrete settings (players, scheme, p_survive) by enumeration; the prize by a grid of
``grid_points`` over [lo, hi], then a golden-section search (a bracketing 1-D search on
certified evaluations; gradients do not steer it) inside the two grid cells around the best
grid point; at the choice, d goal / d prize by automatic differentiation through the fitted
play (stopwise.incentives_gradient), checked against central differences.
An uncertified or infeasible evaluation scores -inf and is never chosen. Uncertainty of the
chosen design's goal: delta method Var g = sum_k (dg/dtheta_k)^2 se_k^2 (central differences)
and a parametric bootstrap theta* ~ N(theta_hat, diag(se^2)); the result JSON stores standard
errors but no covariance, so both ignore correlation between estimates (stated in the output).

Predictions are research estimates for designing experiments, not decisions about people.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from stopwise.contest_counterfactual import _model_and_theta, counterfactual
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.incentives_gradient import prize_derivative

GOALS = ("efficiency", "bust", "risk", "outlay")
SCHEMES = {"winner": False, "keep": True}
GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0
SEARCH_METHOD = (
    "enumeration over players x scheme x p_survive; prize: grid, then golden-section search "
    "on certified evaluations inside the bracket around the best grid point; d/d prize at the "
    "choice by automatic differentiation"
)
COVARIANCE_NOTE = (
    "uncertainty from the fit's standard errors with estimates taken as uncorrelated (the "
    "result JSON stores no covariance)"
)


class NoAdmissibleDesign(Exception):
    """No candidate is both certified and within the limits."""


@dataclass(frozen=True)
class DesignProblem:
    """A goal, its limits and the design space."""

    goal: str
    prize_range: tuple[float, float]
    players: tuple[int, ...]
    schemes: tuple[str, ...]
    p_survive: tuple[float, ...]
    max_bust: float | None = None
    budget: float | None = None
    target_risk: float | None = None
    grid_points: int = 9
    refine_steps: int = 12


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


def check_problem(problem: DesignProblem) -> None:
    """Refuse a goal or limit that cannot be searched (StopwiseInputError, exit code 2)."""
    lo, hi = problem.prize_range
    if problem.goal not in GOALS:
        raise StopwiseInputError(f"unknown goal {problem.goal!r}; choose one of {GOALS}")
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
        raise StopwiseInputError(f"prize range must satisfy 0 < LO <= HI, got {lo}:{hi}")
    unknown = sorted(set(problem.schemes) - set(SCHEMES))
    if unknown or not problem.schemes:
        raise StopwiseInputError(f"unknown scheme(s) {unknown}; choose from {sorted(SCHEMES)}")
    if not problem.players or any(n < 2 for n in problem.players):
        raise StopwiseInputError(f"players must be whole numbers >= 2, got {problem.players}")
    if not problem.p_survive or any(not 0 < p < 1 for p in problem.p_survive):
        raise StopwiseInputError(f"p_survive must lie in (0, 1), got {problem.p_survive}")
    if problem.max_bust is not None and not 0 < problem.max_bust <= 1:
        raise StopwiseInputError(f"max bust rate must lie in (0, 1], got {problem.max_bust}")
    if problem.budget is not None and not problem.budget > 0:
        raise StopwiseInputError(f"budget must be positive, got {problem.budget}")
    if problem.goal == "risk" and problem.target_risk is None:
        raise StopwiseInputError("goal 'risk' needs a target mean number of draws (target_risk)")
    if problem.goal == "outlay" and problem.max_bust is None:
        raise StopwiseInputError("goal 'outlay' minimises outlay subject to a max bust rate")
    if problem.grid_points < 2 or problem.refine_steps < 0:
        raise StopwiseInputError("grid_points must be >= 2 and refine_steps >= 0")


def goal_value(goal: str, row: Mapping[str, Any], target_risk: float | None) -> float:
    """The goal's quantity for one prediction row (see the module docstring)."""
    if goal == "efficiency":
        return float(row["players"] * row["expected_bank"])
    if goal == "bust":
        return float(row["bust_rate"])
    if goal == "risk":
        return abs(float(row["mean_target"]) - float(target_risk))  # type: ignore[arg-type]
    return float(row["prize_outlay"])


def score(problem: DesignProblem, row: Mapping[str, Any]) -> float:
    """Larger is better: the goal (negated when minimised), -inf when the row is uncertified
    or breaks a limit."""
    if not row["certified"]:
        return -math.inf
    if problem.max_bust is not None and row["bust_rate"] > problem.max_bust:
        return -math.inf
    if problem.budget is not None and row["prize_outlay"] > problem.budget:
        return -math.inf
    value = goal_value(problem.goal, row, problem.target_risk)
    return value if problem.goal == "efficiency" else -value


Evaluator = Callable[[int, str, float, float], dict[str, dict[str, Any]]]


def counterfactual_evaluator(fit_input: Any, tolerance: float = 1e-6) -> Evaluator:
    """evaluate(players, scheme, prize, p_survive) -> {"model": row, "nash": row}, rows of
    ``counterfactual`` (uncertified rows kept, marked, never chosen), with memoisation."""
    cache: dict[tuple[int, str, float, float], dict[str, dict[str, Any]]] = {}

    def evaluate(players: int, scheme: str, prize: float, p_survive: float):
        key = (players, scheme, float(prize), float(p_survive))
        if key not in cache:
            setting = {
                "name": f"{scheme} N={players} X={prize:.6g} p={p_survive:g}",
                "players": players,
                "prize": float(prize),
                "keep_bank": SCHEMES[scheme],
                "p_survive": float(p_survive),
            }
            table = counterfactual(
                fit_input, [setting], tolerance=tolerance, allow_approximate=True
            ).table
            rows = table.to_dict(orient="records")
            for row in rows:
                row["scheme_kind"] = scheme
            cache[key] = {"nash": rows[0], "model": rows[1]}
        return cache[key]

    return evaluate


def golden_section(
    objective: Callable[[float], float], lo: float, hi: float, steps: int
) -> list[float]:
    """Points visited by a golden-section search for the maximum of ``objective`` on
    [lo, hi]: each step keeps the sub-bracket [a, d] or [c, b] around the better interior
    point (c = b - g(b - a), d = a + g(b - a), g = (sqrt 5 - 1)/2)."""
    a, b = lo, hi
    c, d = b - GOLDEN * (b - a), a + GOLDEN * (b - a)
    fc, fd = objective(c), objective(d)
    visited = [c, d]
    for _ in range(steps):
        if fc >= fd:
            b, d, fd = d, c, fc
            c = b - GOLDEN * (b - a)
            fc = objective(c)
            visited.append(c)
        else:
            a, c, fc = c, d, fd
            d = a + GOLDEN * (b - a)
            fd = objective(d)
            visited.append(d)
    return visited


def search_setting(
    problem: DesignProblem, evaluate: Evaluator, players: int, scheme: str, p_survive: float
) -> list[float]:
    """Prizes evaluated for one discrete setting: the grid, then the golden-section points
    inside the bracket of the best admissible grid point (none if no grid point is)."""
    lo, hi = problem.prize_range
    grid = [float(x) for x in np.linspace(lo, hi, problem.grid_points)] if hi > lo else [lo]
    scores = [score(problem, evaluate(players, scheme, x, p_survive)["model"]) for x in grid]
    best = int(np.argmax(scores))
    if not math.isfinite(scores[best]) or len(grid) < 3 or problem.refine_steps == 0:
        return grid
    left, right = grid[max(best - 1, 0)], grid[min(best + 1, len(grid) - 1)]

    def objective(x: float) -> float:
        return score(problem, evaluate(players, scheme, x, p_survive)["model"])

    return grid + golden_section(objective, left, right, problem.refine_steps)


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


def search(problem: DesignProblem, evaluate: Evaluator) -> pd.DataFrame:
    """Every evaluation of the search (candidate_frame); the discrete settings enumerated."""
    visited = []
    for players in problem.players:
        for scheme in problem.schemes:
            for p in problem.p_survive:
                prizes = search_setting(problem, evaluate, players, scheme, p)
                visited.extend((players, scheme, x, p) for x in dict.fromkeys(prizes))
    return candidate_frame(problem, evaluate, visited)


def fit_inputs(fit: Any) -> tuple[dict[str, Any], dict[str, float]]:
    """(counterfactual input {"model", "params", "max_target"}, standard errors by name) of a
    saved fit (stopwise.load_result) or a mapping with "model", "params" and optional "se"."""
    if hasattr(fit, "contest_input"):
        base = fit.contest_input()
        frame = fit.params
        se = {str(k): float(v) for k, v in frame["se"].items() if np.isfinite(v)}
    elif isinstance(fit, Mapping):
        model, theta, cap = _model_and_theta(fit)
        base = {"model": model, "params": theta, "max_target": cap}
        se = {str(k): float(v) for k, v in (fit.get("se") or {}).items()}
    else:
        raise StopwiseInputError("design_incentives needs a saved fit or a mapping")
    return base, se


def perturbed(base: Mapping[str, Any], name: str, value: float) -> dict[str, Any]:
    """The fit input with one parameter set to ``value``."""
    return {**base, "params": {**base["params"], name: value}}


QUANTITIES = ("goal_value", "bust_rate", "total_bank", "mean_target")


def predicted_quantities(problem: DesignProblem, row: Mapping[str, Any]) -> dict[str, float]:
    """Goal value, bust rate, expected total bank N E[bank] and mean target of one row."""
    return {
        "goal_value": goal_value(problem.goal, row, problem.target_risk),
        "bust_rate": float(row["bust_rate"]),
        "total_bank": float(row["players"] * row["expected_bank"]),
        "mean_target": float(row["mean_target"]),
    }


def delta_method(
    problem: DesignProblem, base: Mapping[str, Any], se: Mapping[str, float], design: tuple
) -> dict[str, Any]:
    """Standard errors at ``design`` by the delta method for each of QUANTITIES q:
    se(q)^2 = sum_k (dq/dtheta_k)^2 se_k^2, dq/dtheta_k by central differences with step
    h_k = 1e-4 max(1, |theta_k|); a step whose prediction is uncertified gives NaN.
    Top-level "se" and "gradient" are those of the goal."""
    gradients: dict[str, dict[str, float]] = {q: {} for q in QUANTITIES}
    for name in se:
        theta_k = float(base["params"][name])
        h = 1e-4 * max(1.0, abs(theta_k))
        sides = []
        for value in (theta_k + h, theta_k - h):
            row = counterfactual_evaluator(perturbed(base, name, value))(*design)["model"]
            nan = dict.fromkeys(QUANTITIES, math.nan)
            sides.append(predicted_quantities(problem, row) if row["certified"] else nan)
        for q in QUANTITIES:
            gradients[q][name] = (sides[0][q] - sides[1][q]) / (2 * h)
    ses = {
        q: math.sqrt(sum(gradients[q][k] ** 2 * s**2 for k, s in se.items())) for q in QUANTITIES
    }
    return {"se": ses["goal_value"], "gradient": gradients["goal_value"], "se_by_quantity": ses}


def limits_hold(problem: DesignProblem, row: Mapping[str, Any]) -> bool:
    """Whether a prediction meets the bust and budget limits."""
    bust_ok = problem.max_bust is None or row["bust_rate"] <= problem.max_bust
    return bust_ok and (problem.budget is None or row["prize_outlay"] <= problem.budget)


def bootstrap(
    problem: DesignProblem,
    base: Mapping[str, Any],
    se: Mapping[str, float],
    design: tuple,
    draws: int,
    seed: int,
) -> dict[str, Any]:
    """Parametric bootstrap at ``design``: theta* ~ N(theta_hat, diag(se^2)); draws the model
    refuses (outside its parameter range) or whose prediction is uncertified are counted and
    left out. Per quantity: 2.5 and 97.5 percentiles and sd; ``limits_hold_share``: the
    share of used draws whose prediction meets the limits. Top-level band and sd: the goal."""
    rng = np.random.default_rng(seed)
    values: dict[str, list[float]] = {q: [] for q in QUANTITIES}
    refused, held = 0, 0
    for _ in range(draws):
        params = dict(base["params"])
        params.update({k: float(params[k] + s * rng.standard_normal()) for k, s in se.items()})
        try:
            row = counterfactual_evaluator({**base, "params": params})(*design)["model"]
        except (StopwiseInputError, ValueError, FloatingPointError):
            refused += 1
            continue
        if not row["certified"] or not math.isfinite(row["expected_bank"]):
            refused += 1
            continue
        held += limits_hold(problem, row)
        for q, v in predicted_quantities(problem, row).items():
            values[q].append(v)
    summary = {q: _band(v) for q, v in values.items()}
    used = len(values["goal_value"])
    return {
        "draws": draws,
        "used": used,
        "refused": refused,
        "band_95": summary["goal_value"]["band_95"],
        "sd": summary["goal_value"]["sd"],
        "by_quantity": summary,
        "limits_hold_share": held / used if used else None,
    }


def _band(values: Sequence[float]) -> dict[str, Any]:
    band = [float(np.percentile(values, q)) for q in (2.5, 97.5)] if values else [None, None]
    return {"band_95": band, "sd": float(np.std(values, ddof=1)) if len(values) > 1 else None}


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
    refine_steps: int = 12,
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
    base, se = fit_inputs(fit)
    candidates = search(problem, counterfactual_evaluator(base, tolerance))
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
    choice["delta_method"] = delta_method(problem, base, se, design) if se else None
    if bootstrap_draws:
        choice["bootstrap"] = bootstrap(problem, base, se, design, bootstrap_draws, seed)
    cap = int(best.iloc[0]["cap"])
    choice["prize_derivative"] = prize_derivative(
        base["model"],
        base["params"],
        goal,
        (design[0], SCHEMES[design[1]], design[3], cap),
        design[2],
        target_risk,
    )
    if max_bust is not None:  # how fast the limited quantity moves with the prize
        choice["bust_rate_derivative"] = prize_derivative(
            base["model"],
            base["params"],
            "bust",
            (design[0], SCHEMES[design[1]], design[3], cap),
            design[2],
        )
    runners_up = [describe_design(candidates, row) for _, row in best.iloc[1:].iterrows()]
    notes = [COVARIANCE_NOTE] if se else ["the fit carries no standard errors: no uncertainty"]
    if uncertified:
        notes.append(f"{uncertified} uncertified predictions were never chosen")
    return DesignResult(problem, choice, runners_up, candidates, notes)


def describe_design(candidates: pd.DataFrame, model_row: pd.Series) -> dict[str, Any]:
    """A design with its model prediction and the Nash prediction beside it."""
    same = (
        (candidates["players"] == model_row["players"])
        & (candidates["scheme"] == model_row["scheme"])
        & (candidates["prize"] == model_row["prize"])
        & (candidates["p_survive"] == model_row["p_survive"])
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
        "players": int(model_row["players"]),
        "scheme": str(model_row["scheme"]),
        "prize": float(model_row["prize"]),
        "p_survive": float(model_row["p_survive"]),
        "model": {k: _plain(model_row[k]) for k in keys},
        "nash": {k: _plain(nash[k]) for k in keys},
    }


def _plain(value: Any) -> Any:
    return value.item() if hasattr(value, "item") else value
