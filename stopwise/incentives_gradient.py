"""The derivative of a design goal with respect to the prize through the fitted play:
d g / d X for g a smooth function of the model's target distribution sigma(X), by JAX
automatic differentiation through the contest game and the concept's solver (logit QRE:
the implicit function theorem on its fixed point, stopwise.models.contest.qre.solve_root;
level-k and CH: their closed forms). Checked against central differences of the same
goal, (g(X + h) - g(X - h)) / 2h with h = 1e-5 max(1, X)."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import jax
import jax.numpy as jnp

from stopwise.models.base import Model
from stopwise.models.contest.game import make_game, resolve_utility, target_distribution_stats
from stopwise.models.contest.play import concept_log_probs

SMOOTH_GOALS = ("efficiency", "bust", "risk", "outlay")


def design_quantities(model: Model, cap: int, top_k: int = 1) -> Callable[..., dict[str, Any]]:
    """(X, p_survive, players N, keep, T, theta) -> the smooth goal quantities of the fitted
    play sigma(X) with targets 0..cap: efficiency N E[bank]; bust sum_t sigma_t (1 - p^t);
    risk (sum_t t sigma_t - T)^2 (the square of the risk goal's distance, smooth at the
    target); outlay X + keep N E[bank]. One solve of the play; every argument may be traced
    (``top_k`` > 1: the prize X shared among the k top banks)."""
    utility = resolve_utility(model.options.get("utility", "linear"))
    concept = model.options["concept"]

    def quantities(
        prize: Any, p_survive: Any, players: Any, keep: Any, target: Any, params: Any
    ) -> dict[str, Any]:
        game = make_game(
            p_survive, players, prize, keep, cap, 1.0, 0.0, 0.0, utility, params, top_k
        )
        sigma = jnp.exp(concept_log_probs(concept, params, game, model.options))
        sigma = sigma / jnp.sum(sigma)
        stats = target_distribution_stats(game, sigma)
        return {
            "efficiency": players * stats["expected_bank"],
            "bust": stats["bust_rate"],
            "risk": (sigma @ jnp.arange(cap + 1) - target) ** 2,
            "outlay": prize + keep * players * stats["expected_bank"],
        }

    return quantities


def play_quantities(
    model: Model,
    theta: Mapping[str, float],
    design: tuple,
    target_risk: float | None = None,
) -> Callable[[Any], dict[str, Any]]:
    """X -> ``design_quantities`` at ``design`` = (players, keep_bank, p_survive, cap[,
    top_k]) and
    theta (T = 0 when no target is given)."""
    players, keep, p_survive, cap, top_k = _design_terms(design)
    params = {k: jnp.asarray(v, jnp.float64) for k, v in theta.items()}
    target = 0.0 if target_risk is None else float(target_risk)
    quantities = design_quantities(model, cap, top_k)

    def quantities_at(prize: Any) -> dict[str, Any]:
        return quantities(prize, p_survive, float(players), float(keep), target, params)

    return quantities_at


def goal_of_prize(
    model: Model,
    theta: Mapping[str, float],
    goal: str,
    design: tuple,
    target_risk: float | None = None,
) -> Any:
    """g(X) as a JAX function of the prize X: the ``goal`` entry of ``play_quantities``."""
    quantities_at = play_quantities(model, theta, design, target_risk)

    def goal_at(prize: Any) -> Any:
        return quantities_at(prize)[goal]

    return goal_at


_COMPILED_SLOPES: dict[tuple[int, int, int], tuple[Model, Any]] = {}


def _design_terms(design: tuple) -> tuple[int, bool, float, int, int]:
    """(players, keep_bank, p_survive, cap, top_k) of a design tuple (top_k 1 if absent)."""
    players, keep, p_survive, cap, *rest = design
    return int(players), bool(keep), float(p_survive), int(cap), int(rest[0]) if rest else 1


def _slopes_program(model: Model, cap: int, top_k: int) -> Any:
    """jit(jvp of design_quantities in X), one program per model object and cap (theta and
    the design are arguments, so every setting of a search reuses it)."""
    key = (id(model), cap, top_k)
    if key not in _COMPILED_SLOPES or _COMPILED_SLOPES[key][0] is not model:
        if len(_COMPILED_SLOPES) >= 8:
            _COMPILED_SLOPES.clear()
        quantities = design_quantities(model, cap, top_k)

        def values_and_slopes(prize: Any, *rest: Any) -> tuple[Any, Any]:
            def at(x: Any) -> dict[str, Any]:
                return quantities(x, *rest)

            return jax.jvp(at, (prize,), (jnp.ones_like(prize),))

        _COMPILED_SLOPES[key] = (model, jax.jit(values_and_slopes))
    return _COMPILED_SLOPES[key][1]


def prize_slopes(
    model: Model,
    theta: Mapping[str, float],
    design: tuple,
    target_risk: float | None = None,
) -> Callable[[float], dict[str, tuple[float, float]]]:
    """X -> {quantity: (value, d value / d X)} for every entry of ``design_quantities``, by
    forward-mode automatic differentiation (one jvp; QRE's derivative by the implicit
    function theorem on its fixed point, level-k/CH through their closed forms)."""
    players, keep, p_survive, cap, top_k = _design_terms(design)
    program = _slopes_program(model, cap, top_k)
    params = {k: jnp.float64(v) for k, v in theta.items()}
    fixed = (
        jnp.float64(p_survive),
        jnp.float64(players),
        jnp.float64(keep),
        jnp.float64(0.0 if target_risk is None else target_risk),
        params,
    )

    def slopes(prize: float) -> dict[str, tuple[float, float]]:
        values, tangents = program(jnp.float64(prize), *fixed)
        return {k: (float(values[k]), float(tangents[k])) for k in values}

    return slopes


def prize_derivative(
    model: Model,
    theta: Mapping[str, float],
    goal: str,
    design: tuple,
    prize: float,
    target_risk: float | None = None,
) -> dict[str, Any]:
    """{"of": what is differentiated, "derivative": dg/dX by forward-mode automatic
    differentiation, "central_difference": (g(X + h) - g(X - h)) / 2h with h = 1e-5 max(1, |X|)
    (the check), "relative_gap": |ad - fd| / max(|fd|, 1e-12)} at ``prize``, all through the
    compiled program of ``prize_slopes`` (evaluated eagerly, each call compiled the QRE
    solver's loops anew: about 2 s a call)."""
    slopes = prize_slopes(model, theta, design, target_risk)  # one compiled program
    derivative = slopes(prize)[goal][1]
    h = 1e-5 * max(1.0, abs(prize))
    central = (slopes(prize + h)[goal][0] - slopes(prize - h)[goal][0]) / (2 * h)
    gap = abs(derivative - central) / max(abs(central), 1e-12)
    of = "(mean target - target)^2" if goal == "risk" else f"the {goal} goal"
    return {"of": of, "derivative": derivative, "central_difference": central, "relative_gap": gap}
