"""A prize shared among the top k: a player's chance of taking a share.

Rule (our statement): the k top final banks each take prize / k. Players level across the
k-th place are put in a fair random order (every order of the tied players equally likely),
so a player with m opponents strictly above and j opponents level takes a share with
probability

    min(j + 1, max(k - m, 0)) / (j + 1).

The same rule by a uniform tie-break: every player draws v ~ U(0, 1) independently and the
larger v ranks higher among level players. Given the own v, opponent l ranks above
independently with probability pi_l(v) = c_l + e_l (1 - v) (c_l: strictly above, e_l:
level), so

    W = integral_0^1 P(#above <= k - 1 | v) dv.

The integrand is a polynomial of degree n (the number of opponents) in v, so Gauss-Legendre
quadrature with Q nodes on [0, 1] is exact for n <= 2Q - 1; Q = 10 covers 20 players.
Symmetric opponents: #above ~ Binomial(n, pi(v)), P(#above <= k - 1) = sum_{m<k} C(n, m)
pi^m (1 - pi)^(n - m), with C(n, m) by the running product (n - m + 1) / m (n may be a
traced float). Different opponents: the coefficients of prod_l ((1 - pi_l) + pi_l x).
At k = 1 this is W = (a^N - b^N) / (N e), the closed form of stopwise.models.contest.game.

Every function works on numpy arrays (numpy) and on JAX arrays or tracers (jax.numpy);
``k`` is a Python int (static).
"""

from __future__ import annotations

from typing import Any

import numpy as np

QUADRATURE_NODES = 10
_X, _W = np.polynomial.legendre.leggauss(QUADRATURE_NODES)
TIE_BREAK_NODES = 0.5 * (_X + 1.0)  # Gauss-Legendre on [0, 1]
TIE_BREAK_WEIGHTS = 0.5 * _W
MAX_OPPONENTS = 2 * QUADRATURE_NODES - 1


def safe_power(xp: Any, base: Any, exponent: Any) -> Any:
    """base^exponent for base in [0, 1] and exponent >= 0 (1 at exponent 0, also at base 0),
    as exp(exponent log base) with finite derivatives."""
    tiny = xp.maximum(base, 1e-300)
    return xp.where(exponent > 0, xp.exp(exponent * xp.log(tiny)), 1.0)


def binomial_cdf(xp: Any, n: Any, pi: Any, k: int) -> Any:
    """P(Binomial(n, pi) <= k - 1) = sum_{m=0}^{k-1} C(n, m) pi^m (1 - pi)^(n - m)."""
    total = xp.zeros_like(pi)
    coefficient = xp.ones_like(n)
    for m in range(k):
        if m > 0:
            coefficient = coefficient * xp.maximum(n - (m - 1), 0.0) / m
        total = total + coefficient * pi**m * safe_power(xp, 1.0 - pi, xp.maximum(n - m, 0.0))
    return total


def share_prob_symmetric(xp: Any, below: Any, equal: Any, n_players: Any, k: int) -> Any:
    """W per slot against N - 1 opponents who each end strictly below the slot with
    probability ``below`` and level with it with probability ``equal`` (module docstring)."""
    above = xp.clip(1.0 - below - equal, 0.0, 1.0)
    n = n_players - 1.0
    total = xp.zeros_like(below)
    for v, w in zip(TIE_BREAK_NODES, TIE_BREAK_WEIGHTS):
        pi = xp.clip(above + equal * (1.0 - v), 0.0, 1.0)
        total = total + w * binomial_cdf(xp, n, pi, k)
    return total


def share_prob_profile(xp: Any, below: Any, equal: Any, k: int) -> Any:
    """W per slot against opponents l = rows of ``below``/``equal`` (shape (n_opp, slots)):
    the count above has generating polynomial prod_l ((1 - pi_l) + pi_l x)."""
    n_opp = below.shape[0]
    above = xp.clip(1.0 - below - equal, 0.0, 1.0)
    total = xp.zeros_like(below[0])
    for v, w in zip(TIE_BREAK_NODES, TIE_BREAK_WEIGHTS):
        pi = xp.clip(above + equal * (1.0 - v), 0.0, 1.0)
        coeffs = [xp.ones_like(below[0])] + [xp.zeros_like(below[0])] * n_opp
        for j in range(n_opp):
            shifted = [xp.zeros_like(below[0]), *coeffs[:-1]]
            coeffs = [c * (1.0 - pi[j]) + s * pi[j] for c, s in zip(coeffs, shifted)]
        total = total + w * sum(coeffs[:k])
    return total
