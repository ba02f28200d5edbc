"""Nash equilibria against nashpy (random games and contest games) and certificates."""

from __future__ import annotations

import nashpy
import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.models.contest import game as G
from stopwise.models.contest.nash import (
    bimatrix_nash,
    bimatrix_regret,
    constant_sum_split,
    lemke_howson,
    support_enumeration,
    symmetric_nash,
)


def _covers(ours, theirs, tol=1e-8):
    """Every reference equilibrium is among ours (nashpy's support enumeration can drop a
    mixed equilibrium of a 4x3 game with a "degenerate" warning; ours are each checked to
    have regret <= 1e-10 below)."""
    assert len(ours) >= len(theirs) >= 1
    for x, y in theirs:
        assert any(np.allclose(x, a, atol=tol) and np.allclose(y, b, atol=tol) for a, b in ours)


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("seed", range(6))
def test_random_games_match_nashpy(seed):
    # Outside reference: nashpy (Knight & Campbell 2018) support enumeration and
    # Lemke-Howson on random (nondegenerate) bimatrix games, agreement to 1e-8; the odd
    # number of equilibria of nondegenerate games is Wilson's (1971) oddness theorem
    # (from memory).
    rng = np.random.default_rng(seed)
    m, n = (3, 3) if seed % 2 == 0 else (4, 3)
    a, b = rng.normal(size=(m, n)), rng.normal(size=(m, n))
    reference = nashpy.Game(a, b)
    ours = support_enumeration(a, b)
    _covers(ours, [tuple(e) for e in reference.support_enumeration()])
    assert len(ours) % 2 == 1  # nondegenerate games have an odd number of equilibria
    assert all(bimatrix_regret(a, b, x, y) <= 1e-10 for x, y in ours)
    for label in range(m + n):
        x, y = lemke_howson(a, b, label)
        rx, ry = reference.lemke_howson(initial_dropped_label=label)
        assert np.allclose(x, rx, atol=1e-8) and np.allclose(y, ry, atol=1e-8)
    eq = bimatrix_nash(a, b)
    assert eq.max_regret <= 1e-9


def test_contest_game_lp_matches_nashpy():
    # Outside reference: nashpy support enumeration on a winner-take-all contest, cap 6;
    # our equilibrium (zero-sum LP after removing own-target terms) must be among them
    # (1e-8), and the constant-sum split must be detected.
    game = G.make_game(0.8, 2, 1.0, 0.0, 6)
    a = np.asarray(G.payoff_matrix(game))
    assert constant_sum_split(a, a.T)[0]
    eq = bimatrix_nash(a, a.T)
    assert eq.method == "zero-sum LP"
    reference = [tuple(e) for e in nashpy.Game(a, a.T).support_enumeration()]
    assert reference
    assert any(
        np.allclose(eq.row, x, atol=1e-8) and np.allclose(eq.col, y, atol=1e-8)
        for x, y in reference
    )


def test_keep_bank_crra_contest_matches_nashpy():
    # Not constant-sum (CRRA utility, own bank kept): Lemke-Howson and the symmetric
    # N-player solver against nashpy's support enumeration (1e-8).
    game = G.make_game(0.8, 2, 2.0, 1.0, 6, utility=G.resolve_utility("crra"), theta={"r": 0.5})
    a = np.asarray(G.payoff_matrix(game))
    assert not constant_sum_split(a, a.T)[0]
    reference = [tuple(e) for e in nashpy.Game(a, a.T).support_enumeration()]
    eq = bimatrix_nash(a, a.T)
    assert eq.method == "Lemke-Howson"
    assert any(
        np.allclose(eq.row, x, atol=1e-8) and np.allclose(eq.col, y, atol=1e-8)
        for x, y in reference
    )
    sym = symmetric_nash(game)
    assert sym.converged and sym.max_regret <= 1e-9
    assert any(
        np.allclose(sym.sigma, x, atol=1e-8) and np.allclose(sym.sigma, y, atol=1e-8)
        for x, y in reference
    )


def test_symmetric_three_player_certificate():
    # Certificate: the maximum regret of the returned profile, recomputed from the exact
    # payoffs (definition of Nash equilibrium; common practice, no source), <= 1e-9.
    game = G.make_game(0.8, 3, 1.0, 0.0, 6)
    sym = symmetric_nash(game)
    u = np.asarray(G.target_payoffs(game, sym.sigma))
    assert sym.converged
    assert u.max() - sym.sigma @ u <= 1e-9
    assert sym.sigma.min() >= 0 and abs(sym.sigma.sum() - 1) < 1e-12


def test_matching_pennies_value():
    # Matching pennies: unique equilibrium (1/2, 1/2) for both (textbook; common practice,
    # no source).
    a = np.array([[1.0, -1.0], [-1.0, 1.0]])
    eq = bimatrix_nash(a, -a)
    assert np.allclose(eq.row, 0.5, atol=1e-12) and np.allclose(eq.col, 0.5, atol=1e-12)
    assert bimatrix_regret(a, -a, eq.row, eq.col) <= 1e-12
