"""The derivative of a design goal with respect to the prize through the fitted play:
d g / d X for g a smooth function of the model's target distribution sigma(X), by JAX
automatic differentiation through the contest game and the concept's solver (logit QRE:
the implicit function theorem on its fixed point, stopwise.models.contest.qre.solve_root;
level-k and CH: their closed forms). Checked against central differences of the same
goal, (g(X + h) - g(X - h)) / 2h with h = 1e-5 max(1, X)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import jax
import jax.numpy as jnp

from stopwise.models.base import Model
from stopwise.models.contest.game import make_game, resolve_utility, target_distribution_stats
from stopwise.models.contest.play import concept_log_probs

SMOOTH_GOALS = ("efficiency", "bust", "risk", "outlay")


def goal_of_prize(
    model: Model,
    theta: Mapping[str, float],
    goal: str,
    design: tuple[int, bool, float, int],
    target_risk: float | None = None,
) -> Any:
    """g(X) as a JAX function of the prize X for ``design`` = (players, keep_bank, p_survive,
    cap): efficiency N E[bank]; bust sum_t sigma_t (1 - p^t); risk (sum_t t sigma_t - T)^2
    (the square of the risk goal's distance, smooth at the target); outlay X + keep N E[bank]."""
    players, keep, p_survive, cap = design
    params = {k: jnp.asarray(v, jnp.float64) for k, v in theta.items()}
    utility = resolve_utility(model.options.get("utility", "linear"))
    concept = model.options["concept"]

    def goal_at(prize: Any) -> Any:
        game = make_game(
            p_survive, players, prize, float(keep), cap, 1.0, 0.0, 0.0, utility, params
        )
        sigma = jnp.exp(concept_log_probs(concept, params, game, model.options))
        sigma = sigma / jnp.sum(sigma)
        stats = target_distribution_stats(game, sigma)
        if goal == "efficiency":
            return players * stats["expected_bank"]
        if goal == "bust":
            return stats["bust_rate"]
        if goal == "risk":
            return (sigma @ jnp.arange(cap + 1) - target_risk) ** 2
        return prize + float(keep) * players * stats["expected_bank"]

    return goal_at


def prize_derivative(
    model: Model,
    theta: Mapping[str, float],
    goal: str,
    design: tuple[int, bool, float, int],
    prize: float,
    target_risk: float | None = None,
) -> dict[str, Any]:
    """{"of": what is differentiated, "derivative": dg/dX by automatic differentiation, "central_difference": the check,
    "relative_gap": |ad - fd| / max(|fd|, 1e-12)} at ``prize``."""
    goal_at = goal_of_prize(model, theta, goal, design, target_risk)
    x = jnp.float64(prize)
    derivative = float(jax.grad(goal_at)(x))
    h = 1e-5 * max(1.0, abs(prize))
    central = float((goal_at(x + h) - goal_at(x - h)) / (2 * h))
    gap = abs(derivative - central) / max(abs(central), 1e-12)
    of = "(mean target - target)^2" if goal == "risk" else f"the {goal} goal"
    return {"of": of, "derivative": derivative, "central_difference": central, "relative_gap": gap}
