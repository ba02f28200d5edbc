"""Level-k and cognitive hierarchy against hand-derived small games."""

from __future__ import annotations

import math

import jax.numpy as jnp
import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.models.contest import game as G
from stopwise.models.contest.levelk import (
    ch_population,
    ch_strategies,
    level0_strategy,
    levelk_mixture,
    levelk_strategies,
    poisson_weights,
)

# A symmetric 3x3 game: own payoff A[i, j] against an opponent playing j.
A = jnp.asarray([[1.0, 0.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 3.0]])
UNIFORM = jnp.full(3, 1.0 / 3.0)


def _payoffs(sigma):
    return A @ sigma


def test_levelk_hand_derived():
    # Hand derivation (Camerer, Ho & Chong 2004 recursion with logit responses, lambda = 3):
    # level 1 against uniform: U = (1/3, 2/3, 1), sigma1 = (e, e^2, e^3) / (e + e^2 + e^3);
    # level 2: U = (s1_0, 2 s1_1, 3 s1_2), sigma2 = softmax(3 U).
    s = levelk_strategies(_payoffs, UNIFORM, 3.0, 2)
    e1 = np.array([math.e, math.e**2, math.e**3])
    sigma1 = e1 / e1.sum()
    u2 = np.array([sigma1[0], 2 * sigma1[1], 3 * sigma1[2]])
    sigma2 = np.exp(3 * u2) / np.exp(3 * u2).sum()
    assert np.allclose(np.asarray(s), np.vstack([np.full(3, 1 / 3), sigma1, sigma2]), atol=1e-14)
    # a real depth is a binomial mixture of levels 0..2 with mean 1.25: q = 0.625,
    # weights (0.375^2, 2 * 0.625 * 0.375, 0.625^2) (hand derivation)
    weights = np.array([0.375**2, 2 * 0.625 * 0.375, 0.625**2])
    expected = weights @ np.vstack([np.full(3, 1 / 3), sigma1, sigma2])
    assert np.allclose(np.asarray(levelk_mixture(s, 1.25)), expected, atol=1e-14)


def test_cognitive_hierarchy_hand_derived():
    # Hand derivation (Camerer, Ho & Chong 2004): tau = 1, levels 0..2, Poisson weights
    # f = e^-1 (1, 1, 1/2); level 1 believes everyone is level 0, level 2 believes
    # opponents are level 0 or 1 in proportion f0 : f1 = 1 : 1.
    lam, tau = 2.0, 1.0
    f = np.exp(-1.0) * np.array([1.0, 1.0, 0.5])
    assert np.allclose(np.asarray(poisson_weights(tau, 2)), f, atol=1e-15)
    sigma1 = np.exp(lam * np.array([1, 2, 3]) / 3) / np.exp(lam * np.array([1, 2, 3]) / 3).sum()
    belief2 = (np.full(3, 1 / 3) + sigma1) / 2
    u2 = np.asarray(A) @ belief2
    sigma2 = np.exp(lam * u2) / np.exp(lam * u2).sum()
    strategies, _weights = ch_strategies(_payoffs, UNIFORM, lam, tau, 2)
    assert np.allclose(np.asarray(strategies[1]), sigma1, atol=1e-14)
    assert np.allclose(np.asarray(strategies[2]), sigma2, atol=1e-14)
    population = (f[0] / 3 + f[1] * sigma1 + f[2] * sigma2) / f.sum()
    assert np.allclose(
        np.asarray(ch_population(_payoffs, UNIFORM, lam, tau, 2)), population, atol=1e-14
    )


def test_contest_level1_is_logit_response_to_uniform():
    # In a two-player contest, level 1 = softmax(lambda * A @ uniform) with A the payoff
    # matrix built independently of the symmetric payoff path (hand derivation).
    game = G.make_game(0.8, 2, 1.0, 0.0, 6)
    a = np.asarray(G.payoff_matrix(game))
    s = levelk_strategies(lambda sig: G.target_payoffs(game, sig), level0_strategy(game), 5.0, 1)
    u = a @ np.full(7, 1 / 7)
    assert np.allclose(np.asarray(s[1]), np.exp(5 * u) / np.exp(5 * u).sum(), atol=1e-14)
    solo = level0_strategy(game, "solo")
    # solo expected bank t p^t at p = 0.8 peaks at t = 4 and 5 (both 4*0.8^4 = 5*0.8^5);
    # the first maximiser is taken (hand derivation)
    assert int(np.argmax(np.asarray(solo))) == 4
    with pytest.raises(ValueError):
        level0_strategy(game, "smart")
