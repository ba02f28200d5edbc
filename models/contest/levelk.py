"""Level-k and Poisson cognitive hierarchy (Camerer, Ho & Chong 2004) with logit responses.

Both take a symmetric payoff function U(sigma_opp) -> payoff of each own strategy when every
opponent plays sigma_opp (``target_payoffs`` for contests, A @ sigma for a symmetric
two-player matrix game), a level-0 strategy sigma_0 and a precision lambda:

    level-k:  sigma_k = softmax(lambda * U(sigma_{k-1}))                     k = 1..K
    CH:       f_h = Poisson(h; tau), g_k = (sum_{h<k} f_h sigma_h) / sum_{h<k} f_h,
              sigma_k = softmax(lambda * U(g_k)),
              population = sum_{k<=K} f_k sigma_k / sum_{k<=K} f_k       (truncated at K).

Level 0 is uniform over targets, or (option ``level0="solo"``) the single-player optimum:
the target with the highest expected bank for a player on their own.

An estimated level-k depth ``level`` in (0, K) makes the population a discrete mixture of
levels 0..K with binomial weights of mean ``level`` (w_k = C(K,k) q^k (1-q)^(K-k),
q = level/K): smooth in ``level``, so gradient-based fitting works; a fixed integer depth
(option ``level=k``) uses the pure sigma_k.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
from jax.scipy.special import gammaln

from stopwise.models.contest.game import ContestGame, expected_bank

PayoffFn = Callable[[Any], Any]


def level0_strategy(game: ContestGame, kind: str = "uniform") -> Any:
    """Uniform over targets, or a point mass on the solo expected-bank optimum."""
    n = game.n_targets
    if kind == "uniform":
        return jnp.full(n, 1.0 / n)
    if kind == "solo":
        return jax.nn.one_hot(jnp.argmax(expected_bank(game)), n, dtype=jnp.float64)
    raise ValueError(f"level0 must be 'uniform' or 'solo', got {kind!r}")


def levelk_strategies(payoffs: PayoffFn, sigma0: Any, precision: Any, depth: int) -> Any:
    """Rows sigma_0..sigma_depth of the level-k recursion (module docstring)."""

    def step(sigma: Any, _: Any) -> tuple[Any, Any]:
        nxt = jax.nn.softmax(precision * payoffs(sigma))
        return nxt, nxt

    _, higher = jax.lax.scan(step, sigma0, None, length=depth)
    return jnp.concatenate([sigma0[None, :], higher], axis=0)


def levelk_mixture(strategies: Any, level: Any) -> Any:
    """Binomial mixture of levels 0..K with mean `level` (module docstring):
    w_k = C(K, k) q^k (1 - q)^(K - k), q = level / K."""
    depth = strategies.shape[0] - 1
    k = jnp.arange(depth + 1, dtype=jnp.float64)
    q = level / depth
    log_w = (
        gammaln(depth + 1.0)
        - gammaln(k + 1.0)
        - gammaln(depth - k + 1.0)
        + k * jnp.log(q)
        + (depth - k) * jnp.log1p(-q)
    )
    return jnp.exp(log_w) @ strategies


def poisson_weights(tau: Any, depth: int) -> Any:
    """f_h = exp(-tau) tau^h / h!, h = 0..depth (computed in log space)."""
    h = jnp.arange(depth + 1, dtype=jnp.float64)
    return jnp.exp(h * jnp.log(tau) - tau - gammaln(h + 1.0))


def ch_strategies(
    payoffs: PayoffFn, sigma0: Any, precision: Any, tau: Any, depth: int
) -> tuple[Any, Any]:
    """(strategies sigma_0..sigma_K, Poisson weights f_0..f_K) of cognitive hierarchy."""
    f = poisson_weights(tau, depth)
    n = sigma0.shape[0]
    strategies = jnp.zeros((depth + 1, n)).at[0].set(sigma0)

    def step(k: int, strat: Any) -> Any:
        mask = (jnp.arange(depth + 1) < k).astype(jnp.float64) * f
        belief = (mask @ strat) / jnp.sum(mask)
        return strat.at[k].set(jax.nn.softmax(precision * payoffs(belief)))

    strategies = jax.lax.fori_loop(1, depth + 1, step, strategies)
    return strategies, f


def ch_population(payoffs: PayoffFn, sigma0: Any, precision: Any, tau: Any, depth: int) -> Any:
    """Population target distribution sum_k f_k sigma_k / sum_k f_k."""
    strategies, f = ch_strategies(payoffs, sigma0, precision, tau, depth)
    return (f @ strategies) / jnp.sum(f)
