"""Contest normal form: exact payoffs against a Monte-Carlo simulation of the contest, the
tie-splitting formula, the default cap and iterated dominance."""

from __future__ import annotations

import itertools
import math

import jax.numpy as jnp
import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest import game as G
from stopwise.models.contest.dominance import contest_elimination, iterated_elimination


def _simulate_contest(rng, p, gain, start, bust_keep, prize, keep_bank, targets_by_player, n_plays):
    """Monte-Carlo contest: each player's target is drawn from their mixed strategy, draws
    succeed with probability p, the top bank wins (ties broken uniformly at random)."""
    n_players = len(targets_by_player)
    banks = np.empty((n_plays, n_players))
    for i, sigma in enumerate(targets_by_player):
        target = rng.choice(len(sigma), size=n_plays, p=sigma)
        # successes before the first failure: geometric(1-p) - 1
        run = rng.geometric(1.0 - p, size=n_plays) - 1
        reached = run >= target
        banks[:, i] = np.where(
            reached, start + target * gain, bust_keep * (start + np.minimum(run, target) * gain)
        )
    top = banks.max(axis=1, keepdims=True)
    tied = np.isclose(banks, top, rtol=0, atol=1e-12)
    # random tie-break: random keys, winner = tied player with the largest key
    keys = np.where(tied, rng.random(banks.shape), -1.0)
    winner = keys.argmax(axis=1)
    money = keep_bank * banks
    money[np.arange(n_plays), winner] += prize
    return money[:, 0]


@pytest.mark.parametrize(
    ("p", "gain", "start", "bust_keep", "prize", "keep_bank", "profile"),
    [
        # three players, asymmetric profile, winner takes all, ties at a bust bank of 0
        (
            0.8,
            1.0,
            0.0,
            0.0,
            1.0,
            0.0,
            [[0.1, 0.2, 0.3, 0.2, 0.1, 0.1], [0, 0, 0.5, 0.5, 0, 0], [0.3, 0, 0, 0, 0.3, 0.4]],
        ),
        # two players, keep own bank, partial bank kept on a bust, a starting bank
        (
            0.7,
            2.0,
            1.0,
            0.5,
            3.0,
            1.0,
            [[0.2, 0.2, 0.2, 0.2, 0.1, 0.1], [0.0, 0.1, 0.4, 0.3, 0.2, 0.0]],
        ),
    ],
)
def test_exact_payoff_matches_monte_carlo(p, gain, start, bust_keep, prize, keep_bank, profile):
    # Outside check: a direct simulation of the contest rules (DESIGN.md: top bank wins,
    # ties split at random), 10^6 plays, agreement within 4 standard errors
    # (common practice, no source).
    cap = len(profile[0]) - 1
    sigmas = [np.asarray(s, float) for s in profile]
    game = G.make_game(p, len(sigmas), prize, keep_bank, cap, gain, start, bust_keep)
    exact = float(jnp.asarray(sigmas[0]) @ G.target_payoffs_profile(game, jnp.asarray(sigmas[1:])))
    money = _simulate_contest(
        np.random.default_rng(7), p, gain, start, bust_keep, prize, keep_bank, sigmas, 1_000_000
    )
    se = money.std(ddof=1) / math.sqrt(len(money))
    assert abs(money.mean() - exact) < 4 * se


def test_symmetric_win_formula_matches_binomial_sum():
    # W = sum_j C(n,j) e^j b^(n-j) / (j+1): the tie-split probability (each of the j+1 tied
    # players wins with probability 1/(j+1)); evaluated term by term here.
    game = G.make_game(0.75, 5, 1.0, 0.0, 6, start=0.0, bust_keep=0.0)
    sigma = jnp.asarray([0.3, 0.05, 0.1, 0.2, 0.15, 0.1, 0.1])
    f = np.asarray(G.slot_distribution(game, sigma))
    b = f @ np.asarray(game.below)
    e = f @ np.asarray(game.equal)
    n = 4
    direct = sum(math.comb(n, j) * e**j * b ** (n - j) / (j + 1) for j in range(n + 1))
    assert np.allclose(np.asarray(G.win_prob_symmetric(game, jnp.asarray(f))), direct, atol=1e-14)
    profile = np.asarray(G.win_prob_profile(game, jnp.asarray(np.tile(f, (n, 1)))))
    assert np.allclose(profile, direct, atol=1e-14)


def test_two_player_payoffs_are_constant_sum_up_to_own_bank():
    # With the prize won by exactly one player, A[t,s] + A[s,t] = prize + kb (E_t + E_s)
    # (fact of the contest rules; common practice, no source).
    game = G.make_game(0.8, 2, 4.0, 1.0, 8, gain=1.0, start=0.5, bust_keep=0.3)
    a = np.asarray(G.payoff_matrix(game))
    banks = np.asarray(G.expected_bank(game))
    assert np.allclose(a + a.T, 4.0 + banks[:, None] + banks[None, :], atol=1e-12)


def test_default_cap_rule_and_limits():
    # p^M <= 1e-12 at the smallest such M: M = ceil(log(1e-12)/log(p)).
    assert G.default_max_target(0.5) == 40
    assert 0.9 ** G.default_max_target(0.9) <= 1e-12 < 0.9 ** (G.default_max_target(0.9) - 1)
    with pytest.raises(StopwiseInputError, match="max_target"):
        G.default_max_target(0.999)
    with pytest.raises(StopwiseInputError, match="between 0 and 1"):
        G.default_max_target(1.0)


def test_crra_utility_changes_payoffs_only_with_keep_bank():
    # Winner-take-all with one prize: money is 0 or the prize, so any utility is affine on
    # {0, prize} (fact of expected utility; common practice, no source).
    lin = G.make_game(0.8, 2, 5.0, 0.0, 6)
    crra = G.make_game(0.8, 2, 5.0, 0.0, 6, utility=G.resolve_utility("crra"), theta={"r": 0.5})
    a_lin, a_crra = np.asarray(G.payoff_matrix(lin)), np.asarray(G.payoff_matrix(crra))
    # affine: a_crra = slope * a_lin + intercept with slope = (u(5) - u(0)) / 5
    slope, intercept = np.polyfit(a_lin.ravel(), a_crra.ravel(), 1)
    assert np.allclose(a_crra, slope * a_lin + intercept, atol=1e-12)
    assert slope == pytest.approx((5.0**0.5 / 0.5) / 5.0, rel=1e-12)
    kept = G.make_game(0.8, 2, 5.0, 1.0, 6, utility=G.resolve_utility("crra"), theta={"r": 0.5})
    kept_lin = G.make_game(0.8, 2, 5.0, 1.0, 6)
    ratio = np.asarray(G.payoff_matrix(kept)) / np.asarray(G.payoff_matrix(kept_lin))
    assert np.ptp(ratio) > 1e-3


def test_mixed_domination_textbook_example():
    # A strategy dominated by a mixture but by no pure strategy: rows (3,0), (0,3), (1,1);
    # the 50/50 mix of the first two gives (1.5, 1.5) > (1, 1) (textbook example, e.g.
    # Fudenberg & Tirole 1991, ch. 2; from memory).
    result = iterated_elimination(np.array([[3.0, 0.0], [0.0, 3.0], [1.0, 1.0]]), [(0,), (1,)])
    assert result.removed == [(2, 1, "mixed")]
    assert result.surviving == [0, 1]
    # and a pure domination chain: prisoner's dilemma style (common practice, no source)
    pd = np.array([[3.0, 0.0], [5.0, 1.0]])
    assert iterated_elimination(pd, [(0,), (1,)]).surviving == [1]


def test_contest_dominance_keeps_every_nash_target():
    # Iterated strict dominance never removes a strategy used in a Nash equilibrium
    # (Fudenberg & Tirole 1991, ch. 2; from memory).
    from stopwise.models.contest.nash import support_enumeration

    game = G.make_game(0.8, 2, 2.0, 1.0, 6)
    a = np.asarray(G.payoff_matrix(game))
    elim = contest_elimination(game)
    assert elim.checked
    for x, y in support_enumeration(a, a.T):
        used = set(np.flatnonzero(x > 1e-9)) | set(np.flatnonzero(y > 1e-9))
        assert used <= set(elim.surviving)
    assert len(list(itertools.chain(elim.removed))) > 0
