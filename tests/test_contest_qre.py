"""Logit QRE against McKelvey & Palfrey (1995) and pygambit; implicit gradients; limits."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pygambit as gbt
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.models.contest import game as G
from stopwise.models.contest import qre
from stopwise.models.contest.nash import bimatrix_nash, polish_on_supports

# McKelvey & Palfrey (1995), asymmetric matching pennies with the payoffs of Ochs (1995)
# (as given in issue 5 and replicated in the Gambit documentation).
MP_ROW = np.array([[1.1141, 0.0], [0.0, 0.2785]])
MP_COL = np.array([[0.0, 1.1141], [1.1141, 0.0]])


def _gambit_profiles(a, b, lams):
    """pygambit's logit QRE (its branch tracer) at the given precisions."""
    game = gbt.Game.from_arrays(a, b)
    players = list(game.players)
    out = []
    for result in gbt.qre.logit_solve_lambda(game, list(lams)):
        out.append([np.array([float(result.profile[s]) for s in p.strategies]) for p in players])
    return out


@pytest.mark.parametrize(
    ("lam", "row", "col"), [(1.0, 0.5868, 0.4518), (2.0, 0.6175, 0.3720), (3.0, 0.6169, 0.3140)]
)
def test_mckelvey_palfrey_1995_values(lam, row, col):
    # McKelvey & Palfrey (1995), QRE of the Ochs (1995) game at lambda = 1, 2, 3 (values to
    # four decimals as given in issue 5 / the Gambit documentation).
    s1, s2 = qre.qre_bimatrix(lam, jnp.asarray(MP_ROW), jnp.asarray(MP_COL))
    assert float(s1[0]) == pytest.approx(row, abs=5e-5)
    assert float(s2[0]) == pytest.approx(col, abs=5e-5)


def test_mckelvey_palfrey_limit_is_nash():
    # The principal branch tends to the Nash equilibrium (0.5, 0.2) (McKelvey & Palfrey 1995;
    # 0.2 is 0.2785/1.3926 = 0.19998... with these rounded payoffs).
    branch = qre.trace_bimatrix(MP_ROW, MP_COL, tolerance=1e-8)
    assert branch.converged
    x = np.exp(branch.last.log_probs)
    assert x[0] == pytest.approx(0.5, abs=1e-4) and x[2] == pytest.approx(0.2, abs=1e-4)
    px, py = polish_on_supports(MP_ROW, MP_COL, x[:2], x[2:])
    assert px[0] == pytest.approx(0.5, abs=1e-12)
    assert py[0] == pytest.approx(0.2785 / (0.2785 + 1.1141), abs=1e-12)


def test_mckelvey_palfrey_fit():
    # 128 observations with frequencies 0.527 / 0.366: lambda-hat 1.8456 and log-likelihood
    # -174.7645 (McKelvey & Palfrey 1995 as replicated in the Gambit documentation).
    lam, loglik = qre.fit_bimatrix_precision(
        MP_ROW, MP_COL, 128 * np.array([0.527, 0.473]), 128 * np.array([0.366, 0.634])
    )
    assert lam == pytest.approx(1.8456, abs=5e-5)
    assert loglik == pytest.approx(-174.7645, abs=5e-5)


def test_matches_pygambit_on_random_and_contest_games():
    # Outside reference: pygambit's logit QRE solver (logit_solve_lambda) on the same normal
    # form, agreement 1e-6 (pygambit stops within ~1e-8 of the requested lambda).
    rng = np.random.default_rng(3)
    cases = [(rng.normal(size=(3, 4)), rng.normal(size=(3, 4)))]
    contest = np.asarray(G.payoff_matrix(G.make_game(0.8, 2, 1.0, 0.0, 6)))
    cases.append((contest, contest.T))
    lams = (0.5, 2.0, 6.0)
    for a, b in cases:
        reference = _gambit_profiles(a, b, lams)
        for lam, (r1, r2) in zip(lams, reference):
            s1, s2 = qre.qre_bimatrix(lam, jnp.asarray(a), jnp.asarray(b))
            assert np.allclose(np.asarray(s1), r1, atol=1e-6)
            assert np.allclose(np.asarray(s2), r2, atol=1e-6)


def test_symmetric_qre_equals_two_player_qre():
    # Internal consistency: the symmetric N-player formulation at N = 2 is the bimatrix QRE
    # of (A, A^T) (unique for this constant-sum game: McKelvey & Palfrey 1995, from memory).
    game = G.make_game(0.8, 2, 1.0, 0.0, 6)
    a = G.payoff_matrix(game)
    s1, _ = qre.qre_bimatrix(4.0, a, a.T)
    assert np.allclose(np.asarray(qre.qre_symmetric(4.0, game)), np.asarray(s1), atol=1e-10)


def test_implicit_gradient_matches_finite_differences():
    # The custom JVP (implicit function theorem) against central finite differences of the
    # forward solution (common practice, no source).
    crra = G.resolve_utility("crra")

    @jax.jit
    def mean_target(lam, r):
        game = G.make_game(0.8, 3, 2.0, 1.0, 6, utility=crra, theta={"r": r})
        return jnp.arange(7.0) @ qre.qre_symmetric(lam, game)

    grad = jax.jit(jax.grad(mean_target, argnums=(0, 1)))(1.5, 0.3)
    h = 1e-5
    fd_lam = (mean_target(1.5 + h, 0.3) - mean_target(1.5 - h, 0.3)) / (2 * h)
    fd_r = (mean_target(1.5, 0.3 + h) - mean_target(1.5, 0.3 - h)) / (2 * h)
    assert float(grad[0]) == pytest.approx(float(fd_lam), rel=1e-5, abs=1e-8)
    assert float(grad[1]) == pytest.approx(float(fd_r), rel=1e-5, abs=1e-8)


def test_qre_tends_to_nash_and_agrees_with_pygambit_limit():
    # QRE -> Nash as precision grows (McKelvey & Palfrey 1995): the regret of the traced
    # branch falls below 1e-6 and its end agrees with the Nash equilibrium and with
    # pygambit's branch limit (logit_solve) on the same contest.
    game = G.make_game(0.8, 2, 1.0, 0.0, 6)
    a = np.asarray(G.payoff_matrix(game))
    branch = qre.trace_bimatrix(a, a.T, tolerance=1e-6)
    assert branch.converged
    regrets = [p.max_regret for p in branch.points]
    assert regrets[-1] <= 1e-6 < regrets[len(regrets) // 2]
    x = np.exp(branch.last.log_probs)
    nash = bimatrix_nash(a, a.T)
    assert np.allclose(x[:7], nash.row, atol=1e-4)
    result = gbt.nash.logit_solve(gbt.Game.from_arrays(a, a.T), maxregret=1e-6)
    player = next(iter(result.equilibria[0].game.players))
    gambit_row = np.array([float(result.equilibria[0][s]) for s in player.strategies])
    assert np.allclose(x[:7], gambit_row, atol=1e-4)
