"""The incentive-design problem: goals, limits, schemes and how one prediction scores.

A design d = (players N, scheme, prize X, p_survive p). Schemes:

    winner  the top final bank takes the prize X (ties: a fair random draw)
    keep    as winner, and every player also keeps their own bank
    topK    (K = 2, 3, ...; K < N) the K top final banks each take X / K; players level
            across the K-th place are ordered by a fair random draw, so a player tied with
            j others when m players are strictly ahead takes a share with probability
            min(j + 1, max(K - m, 0)) / (j + 1) (stopwise.models.contest.topk)

Goals, on the model's prediction sigma_d (symmetric play):

    efficiency: maximise  N * E[bank | sigma_d]          (expected total bank of a group)
    bust:       minimise  P(bust | sigma_d) = sum_t sigma_d(t) (1 - p^t)
    risk:       minimise  |sum_t t sigma_d(t) - target_risk|   (reach a mean target)
    outlay:     minimise  X + keep * N * E[bank | sigma_d]     subject to max_bust

Limits: P(bust | sigma_d) <= max_bust, outlay <= budget (expected prize outlay per group).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from stopwise.data_schemas.errors import StopwiseInputError

GOALS = ("efficiency", "bust", "risk", "outlay")
PLAIN_SCHEMES = {"winner": False, "keep": True}
TOP_K = re.compile(r"^top([0-9]+)$")
QUANTITIES = ("goal_value", "bust_rate", "total_bank", "mean_target")


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


def scheme_terms(scheme: str) -> tuple[bool, int]:
    """(keep_bank, k: how many top places share the prize) of a scheme name; winner and
    keep have k = 1, topK has k = K and keep_bank False."""
    if scheme in PLAIN_SCHEMES:
        return PLAIN_SCHEMES[scheme], 1
    match = TOP_K.match(scheme)
    if match is None or int(match.group(1)) < 2:
        raise StopwiseInputError(
            f"unknown scheme {scheme!r}; choose from winner, keep or topK with K >= 2 "
            "(e.g. top2: the two top banks share the prize)"
        )
    return False, int(match.group(1))


def scheme_applies(scheme: str, players: int) -> bool:
    """A top-K scheme needs more than K players (with K >= N everyone shares the prize)."""
    return scheme_terms(scheme)[1] < players


def design_setting(players: int, scheme: str, prize: float, p_survive: float) -> dict[str, Any]:
    """The counterfactual scheme mapping of one design."""
    keep, top_k = scheme_terms(scheme)
    return {
        "name": f"{scheme} N={players} X={prize:.6g} p={p_survive:g}",
        "players": int(players),
        "prize": float(prize),
        "keep_bank": keep,
        "top_k": top_k,
        "p_survive": float(p_survive),
    }


def check_problem(problem: DesignProblem) -> None:
    """Refuse a goal or limit that cannot be searched (StopwiseInputError, exit code 2)."""
    lo, hi = problem.prize_range
    if problem.goal not in GOALS:
        raise StopwiseInputError(f"unknown goal {problem.goal!r}; choose one of {GOALS}")
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
        raise StopwiseInputError(f"prize range must satisfy 0 < LO <= HI, got {lo}:{hi}")
    if not problem.schemes:
        raise StopwiseInputError("unknown scheme(s) []; choose winner, keep or topK")
    for scheme in problem.schemes:
        scheme_terms(scheme)
    if not problem.players or any(n < 2 for n in problem.players):
        raise StopwiseInputError(f"players must be whole numbers >= 2, got {problem.players}")
    if not any(scheme_applies(s, n) for s in problem.schemes for n in problem.players):
        raise StopwiseInputError(
            f"no scheme of {problem.schemes} applies to groups of {problem.players}: a topK "
            "scheme needs more than K players"
        )
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


def limits_hold(problem: DesignProblem, row: Mapping[str, Any]) -> bool:
    """Whether a prediction meets the bust and budget limits."""
    bust_ok = problem.max_bust is None or row["bust_rate"] <= problem.max_bust
    return bust_ok and (problem.budget is None or row["prize_outlay"] <= problem.budget)


def score(problem: DesignProblem, row: Mapping[str, Any]) -> float:
    """Larger is better: the goal (negated when minimised), -inf when the row is uncertified
    or breaks a limit."""
    if not row["certified"] or not limits_hold(problem, row):
        return -math.inf
    value = goal_value(problem.goal, row, problem.target_risk)
    return value if problem.goal == "efficiency" else -value


def predicted_quantities(problem: DesignProblem, row: Mapping[str, Any]) -> dict[str, float]:
    """Goal value, bust rate, expected total bank N E[bank] and mean target of one row."""
    return {
        "goal_value": goal_value(problem.goal, row, problem.target_risk),
        "bust_rate": float(row["bust_rate"]),
        "total_bank": float(row["players"] * row["expected_bank"]),
        "mean_target": float(row["mean_target"]),
    }
