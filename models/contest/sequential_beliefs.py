"""Level-k and cognitive-hierarchy beliefs in sequential contests.

Later movers see the state and move last among those who matter to them, so their level
only decides whether they think at all: a level-0 mover stops with probability 1/2 at every
decision node below the cap (uniform over the two actions), a mover of level >= 1 plays the
agent logit response to the state (sequential_likelihood), with correct beliefs about any
movers after them. The first mover's level shapes what they believe about the later movers:

    level 0:       stops with probability 1/2 at every node
    level k >= 1:  logit response (precision lambda) to the belief that a later mover is of
                   level 0 with probability a_k and of level >= 1 otherwise,
                   win(x) = a_k G_1^uniform(x, 1) + (1 - a_k) G_1^logit(x, 1)

with a_1 = 1 and a_k = 0 for k >= 2 under level-k, and a_k = f_0 / sum_{i<k} f_i under the
Poisson cognitive hierarchy (f_i = exp(-tau) tau^i / i!, levels 0..CH_DEPTH). A population
of types (weights w) moves by the mixture's hazard: with alive_type(s) = prod_{s'<s} P_type
(draw at s'),

    P(stop at s | reached s) = sum_type w alive_type(s) P_type(stop at s)
                               / sum_type w alive_type(s),

exact under censoring, since busts do not depend on the type. Level-k weights are binomial
over levels 0..MAX_LEVEL with mean ``level`` (or one level, option level=K); cognitive
hierarchy weights are Poisson, truncated and renormalised.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, NamedTuple

import jax.numpy as jnp
from jax.scipy.special import gammaln, logsumexp

CH_DEPTH = 15
MAX_LEVEL = 6


class Beliefs(NamedTuple):
    """First-mover types: weights w, whether the type thinks (1) or stops at random (0),
    and a (belief that later movers are level 0); later movers: weight of level 0."""

    weights: Any
    thinks: Any
    level0_belief: Any
    later_level0: Any


def binomial_level_weights(level: Any, depth: int = MAX_LEVEL) -> Any:
    """w_k = C(K, k) q^k (1 - q)^(K - k), q = level / K, k = 0..K."""
    k = jnp.arange(depth + 1, dtype=jnp.float64)
    q = level / depth
    return jnp.exp(
        gammaln(depth + 1.0)
        - gammaln(k + 1.0)
        - gammaln(depth - k + 1.0)
        + k * jnp.log(q)
        + (depth - k) * jnp.log1p(-q)
    )


def levelk_beliefs(theta: Mapping[str, Any], fixed_level: int | None) -> Beliefs:
    """Level-k types: level 0 (random), level 1 (a = 1), levels >= 2 (a = 0)."""
    if fixed_level is not None:
        one_hot = jnp.zeros(3).at[min(int(fixed_level), 2)].set(1.0)
        return Beliefs(one_hot, jnp.array([0.0, 1.0, 1.0]), jnp.array([0.0, 1.0, 0.0]), one_hot[0])
    w = binomial_level_weights(theta["level"])
    weights = jnp.stack([w[0], w[1], jnp.sum(w[2:])])
    return Beliefs(weights, jnp.array([0.0, 1.0, 1.0]), jnp.array([0.0, 1.0, 0.0]), w[0])


def ch_beliefs(theta: Mapping[str, Any], depth: int = CH_DEPTH) -> Beliefs:
    """Poisson cognitive-hierarchy types 0..depth: a_k = f_0 / sum_{i<k} f_i."""
    h = jnp.arange(depth + 1, dtype=jnp.float64)
    f = jnp.exp(h * jnp.log(theta["tau"]) - theta["tau"] - gammaln(h + 1.0))
    below = jnp.concatenate([jnp.ones(1), jnp.cumsum(f)[:-1]])  # sum_{i<k} f_i (k >= 1)
    a = jnp.where(h >= 1, f[0] / below, 0.0)
    thinks = (h >= 1).astype(jnp.float64)
    return Beliefs(f / jnp.sum(f), thinks, a, f[0] / jnp.sum(f))


def beliefs_for(
    concept: str, theta: Mapping[str, Any], options: Mapping[str, Any]
) -> Beliefs | None:
    """The concept's types (None for agent logit play: one type, correct beliefs)."""
    if concept == "levelk":
        return levelk_beliefs(theta, options.get("level"))
    if concept == "ch":
        return ch_beliefs(theta)
    return None


def mixture_hazard(log_weights: Any, log_stop: Any, log_draw: Any) -> tuple[Any, Any]:
    """(log P(stop at s | reached s), log P(draw at s | reached s)) of a population of
    types with rows log_stop[type], log_draw[type] (module docstring)."""
    alive = jnp.concatenate(
        [jnp.zeros((log_draw.shape[0], 1)), jnp.cumsum(log_draw[:, :-1], axis=1)], axis=1
    )
    reached = log_weights[:, None] + alive
    denominator = logsumexp(reached, axis=0)
    draw = logsumexp(reached[:, :-1] + log_draw[:, :-1], axis=0) - denominator[:-1]
    return (
        logsumexp(reached + log_stop, axis=0) - denominator,
        jnp.concatenate([draw, jnp.full(1, -jnp.inf)]),  # forced stop at the cap
    )
