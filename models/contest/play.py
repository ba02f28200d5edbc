"""How a contest model plays: each concept's target distribution, the hazard likelihood
of the decision rows and the simulator (composed into a Model by models/contest/build.py).

Per contest condition a concept gives a target distribution sigma over 0..cap (Nash through
a host solver with derivatives by the implicit function theorem on the indifference system
of its support; logit QRE, agent QRE, level-k mixtures of levels 0..6 and Poisson cognitive
hierarchy truncated at 15 levels); with S(s) = P(T >= s) = sum_{t>=s} sigma_t,

    P(draw at step s) = S(s+1) / S(s),      P(stop at s) = sigma_s / S(s).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.agent import agent_qre_log_probs
from stopwise.models.contest.game import (
    ContestGame,
    as_jax_game,
    default_max_target,
    target_payoffs,
)
from stopwise.models.contest.levelk import (
    ch_population,
    level0_strategy,
    levelk_mixture,
    levelk_strategies,
)
from stopwise.models.contest.nash import _support_equations, contest_nash
from stopwise.models.contest.qre import _continuation, symmetric_residual

CH_DEPTH = 15
MAX_LEVEL = 6


# ----------------------------------------------------------------------------- Nash in JAX


def _nash_host(
    log_q: Any,
    scores: Any,
    below: Any,
    equal: Any,
    du: Any,
    u0: Any,
    n_players: Any,
    top_k: Any = None,
) -> np.ndarray:
    """Symmetric Nash sigma on the host (pure callback)."""
    fields = (log_q, scores, below, equal, du, u0, n_players, top_k)
    game = as_jax_game(ContestGame(*fields))
    return np.asarray(contest_nash(game)[0], dtype=np.float64)


@jax.custom_jvp
def nash_sigma(game: ContestGame) -> Any:
    """Symmetric Nash equilibrium of the contest (host solver through a pure callback)."""
    shape = jax.ShapeDtypeStruct((game.n_targets,), jnp.float64)
    return jax.pure_callback(_nash_host, shape, *game, vmap_method="sequential")


@nash_sigma.defjvp
def _nash_sigma_jvp(primals: tuple[ContestGame], tangents: tuple[ContestGame]) -> tuple[Any, Any]:
    """Implicit derivative of the indifference system G(sigma, v; game) = 0 on the support."""
    (game,), (game_dot,) = primals, tangents
    sigma = nash_sigma(game)
    mask = sigma > 1e-12
    value = sigma @ target_payoffs(game, sigma)
    z = jnp.concatenate([sigma, value[None]])
    jac = jax.jacfwd(_support_equations)(z, game, mask)
    _, g_dot = jax.jvp(lambda g: _support_equations(z, g, mask), (game,), (game_dot,))
    dz = -jnp.linalg.solve(jac, g_dot)
    return sigma, dz[:-1]


# ----------------------------------------------------------------------------- concepts


def concept_log_probs(
    concept: str, theta: Mapping[str, Any], game: ContestGame, options: Mapping[str, Any]
) -> Any:
    """log sigma_t over targets 0..cap for one contest under `concept` (module docstring)."""
    n = game.n_targets
    if concept == "qre":
        x0 = jnp.full(n, -jnp.log(n))
        log_sigma = _continuation(
            symmetric_residual, x0, theta["precision"], (game,), 24, 3, 6, game.payoff_range
        )
    elif concept == "aqre":
        log_sigma = agent_qre_log_probs(theta["precision"], game)
    elif concept == "nash":  # mixed with the tremble in probability space (sigma_t may be 0)
        eps = theta["tremble"]
        return jnp.log((1.0 - eps) * jnp.maximum(nash_sigma(game), 0.0) + eps / n)
    else:
        sigma0 = level0_strategy(game, options.get("level0", "uniform"))

        def payoffs(s: Any) -> Any:
            return target_payoffs(game, s)

        if concept == "levelk":
            strategies = levelk_strategies(payoffs, sigma0, theta["precision"], MAX_LEVEL)
            level = options.get("level")
            sigma = (
                strategies[int(level)]
                if level is not None
                else levelk_mixture(strategies, theta["level"])
            )
        else:
            sigma = ch_population(payoffs, sigma0, theta["precision"], theta["tau"], CH_DEPTH)
        log_sigma = jnp.log(sigma)
    if "tremble" in theta:
        eps = theta["tremble"]
        log_sigma = jnp.logaddexp(jnp.log1p(-eps) + log_sigma, jnp.log(eps) - jnp.log(n))
    return log_sigma


def hazard_loglik(log_sigma: Any, step: Any, draw: Any) -> Any:
    """log P(draw at s) = log S(s+1) - log S(s), log P(stop at s) = log sigma_s - log S(s)."""
    log_surv = jax.lax.cumlogsumexp(log_sigma, reverse=True)
    log_surv = jnp.concatenate([log_surv, jnp.full(1, -jnp.inf)])
    s = jnp.clip(step, 0, log_sigma.shape[-1] - 1)
    here = log_surv[s]
    return jnp.where(draw > 0.5, log_surv[s + 1] - here, log_sigma[s] - here)


# ----------------------------------------------------------------------------- simulation


def simulate_contest(
    target_distribution: Any,
    theta: Mapping[str, Any],
    design: pd.DataFrame,
    key: Any,
    options: Mapping[str, Any],
) -> pd.DataFrame:
    """Decision rows of contest play: each trial's target drawn from the concept's
    distribution for its condition, then draws succeed with probability p_survive until the
    target is reached (stop) or a draw fails (bust). Unless the design has a ``group`` column,
    the players of one trial number and condition are grouped n_players at a time."""
    needed = {"subject", "trial", "p_survive", "gain"}
    missing = needed - set(design.columns)
    if missing:
        raise StopwiseInputError(f"contest design lacks column(s) {sorted(missing)}")
    d = design.copy()
    for column, default in (
        ("start", 0.0),
        ("bust_keep", 0.0),
        ("n_players", 2),
        ("prize", 1.0),
        ("keep_bank", 0),
    ):
        if column not in d:
            d[column] = default
    seed = int(jax.random.randint(key, (), 0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    keys = ["p_survive", "gain", "start", "bust_keep", "n_players", "prize", "keep_bank"]
    if "group" not in d:  # players of one trial (round) and condition, n_players at a time
        by_round = [*keys, "trial"]
        chunk = d.groupby(by_round, sort=False).cumcount() // d["n_players"].astype(int)
        d["group"] = pd.Series(list(zip(*(d[k] for k in by_round), chunk)), index=d.index)
        d["group"] = d.groupby("group", sort=False).ngroup()
    rows: list[dict] = []
    for values, block in d.groupby(keys, sort=False):
        cond = dict(zip(keys, values))
        cap = options.get("max_target") or default_max_target(cond["p_survive"])
        sigma = target_distribution(
            theta,
            cond["p_survive"],
            int(cond["n_players"]),
            cond["prize"],
            float(cond["keep_bank"]),
            int(cap),
            cond["gain"],
            cond["start"],
            cond["bust_keep"],
        )
        sigma = np.clip(sigma, 0.0, None)
        targets = rng.choice(len(sigma), size=len(block), p=sigma / sigma.sum())
        for trial, target in zip(block.to_dict("records"), targets):
            rows.extend(_play_trial(trial, int(target), rng))
    return pd.DataFrame(rows)


def _play_trial(trial: dict, target: int, rng: np.random.Generator) -> list[dict]:
    out = []
    base = {k: v for k, v in trial.items() if k not in ("draws", "busted")}
    base["task"] = "contest"
    for step in range(target + 1):
        if step == target:
            out.append({**base, "step": step, "action": "stop", "outcome": ""})
            break
        success = rng.random() < trial["p_survive"]
        out.append(
            {**base, "step": step, "action": "draw", "outcome": "success" if success else "bust"}
        )
        if not success:
            break
    return out
