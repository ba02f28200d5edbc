"""Agent logit QRE on the draw/stop decisions (McKelvey & Palfrey 1998), symmetric contests.

Each decision node s = 0..cap-1 (s successes so far, still alive) is an agent who draws with
probability b_s = sigmoid(y_s); at the cap the player stops. Opponents use the same behaviour
strategy, which induces the target distribution

    log P(T = t) = sum_{s<t} log b_s + log(1 - b_t)        (log(1 - b_cap) = 0).

With slot payoffs pi (``game.slot_payoffs`` against that distribution), continuation values
are computed backward,

    V(cap) = pi[reach cap]
    D(s)   = p V(s+1) + (1-p) pi[bust after s]       (value of drawing at s)
    V(s)   = b_s D(s) + (1 - b_s) pi[reach s],

and the agent QRE is the root of y - lambda (D - pi[reach s])_{s<cap} = 0 (logit on the two
actions), found like the normal-form QRE by continuation in lambda from 0 and Newton with
implicit derivatives (``qre.solve_root``).
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp

from stopwise.models.contest.game import (
    ContestGame,
    slot_distribution,
    slot_payoffs,
    win_prob_symmetric,
)
from stopwise.models.contest.qre import _continuation


def target_log_probs_from_behaviour(y: Any) -> Any:
    """log P(T = t), t = 0..cap, from draw log-odds y_0..y_{cap-1}."""
    log_draw = jax.nn.log_sigmoid(y)
    log_stop = jax.nn.log_sigmoid(-y)
    reached = jnp.concatenate([jnp.zeros(1), jnp.cumsum(log_draw)])
    return reached + jnp.concatenate([log_stop, jnp.zeros(1)])


def draw_advantage(game: ContestGame, y: Any) -> Any:
    """D(s) - pi[reach s] for s = 0..cap-1 given the behaviour strategy y for everyone."""
    cap = game.n_targets - 1
    sigma = jnp.exp(target_log_probs_from_behaviour(y))
    pi = slot_payoffs(game, win_prob_symmetric(game, slot_distribution(game, sigma)))
    p = jnp.exp(game.log_q[1, 1])
    stop_value = pi[: cap + 1]
    bust_value = pi[cap + 1 :]
    draw_prob = jax.nn.sigmoid(y)

    def back(v_next: Any, s: Any) -> tuple[Any, Any]:
        draw = p * v_next + (1.0 - p) * bust_value[s]
        v = draw_prob[s] * draw + (1.0 - draw_prob[s]) * stop_value[s]
        return v, draw - stop_value[s]

    _, advantage = jax.lax.scan(back, stop_value[cap], jnp.arange(cap - 1, -1, -1))
    return advantage[::-1]


def agent_residual(y: Any, params: tuple[Any, ContestGame]) -> Any:
    """F(y) = y - lambda * (D(y) - pi_stop)."""
    precision, game = params
    return y - precision * draw_advantage(game, y)


def agent_qre_log_probs(
    precision: Any, game: ContestGame, steps: int = 24, newton_per_step: int = 3, polish: int = 6
) -> Any:
    """log P(T = t) under the symmetric agent QRE at `precision`."""
    y0 = jnp.zeros(game.n_targets - 1)
    y = _continuation(
        agent_residual, y0, precision, (game,), steps, newton_per_step, polish, game.payoff_range
    )
    return target_log_probs_from_behaviour(y)


@jax.jit
def agent_qre_with_residual(precision: Any, game: ContestGame) -> tuple[Any, Any]:
    """(log P(T = t), max |F(y)|) of the agent QRE at `precision`: the distribution and the
    fixed-point residual y - lambda (D(y) - pi_stop) in log-odds units."""
    y0 = jnp.zeros(game.n_targets - 1)
    y = _continuation(agent_residual, y0, precision, (game,), 24, 3, 6, game.payoff_range)
    return target_log_probs_from_behaviour(y), jnp.max(
        jnp.abs(agent_residual(y, (precision, game)))
    )
