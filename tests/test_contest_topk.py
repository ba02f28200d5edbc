"""A prize shared among the top k (issue 21): the game's payoffs against brute-force
enumeration of every outcome for 3 players and k = 2, a Monte Carlo contest, the k = 1
reduction to the closed form, and the solvers' certified answers recomputed from the
enumerated payoffs.

Strategies below are invented for the tests (no data); every expected value is computed
here by enumeration or simulation, independently of stopwise.models.contest.topk.
"""

from __future__ import annotations

import itertools
import math

import jax.numpy as jnp
import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.contest import counterfactual
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.game import (
    make_numpy_game,
    resolve_utility,
    target_payoffs,
    target_payoffs_profile,
    win_prob_symmetric,
)
from stopwise.models.contest.topk import share_prob_symmetric

P, CAP, PRIZE, K = 0.7, 3, 6.0, 2


def outcomes(target: int) -> list[tuple[float, float]]:
    """(final bank, probability) of aiming for ``target`` draws of gain 1 from bank 0: reach
    it with p^t, bust (bank 0) after k < t successes with p^k (1 - p)."""
    busts = [(0.0, P**k * (1 - P)) for k in range(target)]
    return [(float(target), P**target), *busts]


def share_of(banks: tuple[float, ...], player: int, k: int) -> float:
    """Probability that ``player`` is among the k top banks when level players are put in a
    uniformly random order: enumerates every order of the players (brute force)."""
    orders = list(itertools.permutations(range(len(banks))))
    wins = 0
    for order in orders:  # order[i] breaks ties: earlier in the permutation ranks higher
        rank = sorted(range(len(banks)), key=lambda i: (-banks[i], order.index(i)))
        wins += rank.index(player) < k
    return wins / len(orders)


def enumerated_payoffs(
    opponent_strategies: list[np.ndarray], keep: float, utility, theta
) -> np.ndarray:
    """U_t = E[u(keep * bank + prize/k * 1{share}) + ...] for player 0 aiming t, by summing
    over every target and outcome of every player (independent of the game's arrays)."""
    u = lambda x: float(np.asarray(utility(jnp.float64(x), theta)))  # noqa: E731
    payoffs = np.zeros(CAP + 1)
    for t in range(CAP + 1):
        for targets in itertools.product(range(CAP + 1), repeat=len(opponent_strategies)):
            weight = math.prod(s[j] for s, j in zip(opponent_strategies, targets))
            if weight == 0:
                continue
            lists = [outcomes(t)] + [outcomes(j) for j in targets]
            for combo in itertools.product(*lists):
                prob = weight * math.prod(pr for _, pr in combo)
                banks = tuple(b for b, _ in combo)
                w = share_of(banks, 0, K)
                own = keep * banks[0]
                payoffs[t] += prob * (w * u(own + PRIZE / K) + (1 - w) * u(own))
    return payoffs


def game(keep: float = 0.0, utility: str = "linear", theta=None):
    return make_numpy_game(
        P, 3, PRIZE, keep, CAP, utility=resolve_utility(utility), theta=theta or {}, top_k=K
    )


STRATEGIES = [np.array([0.1, 0.2, 0.3, 0.4]), np.array([0.5, 0.0, 0.25, 0.25])]


@pytest.mark.parametrize(
    ("keep", "utility", "theta"),
    [(0.0, "linear", {}), (1.0, "linear", {}), (1.0, "crra", {"r": jnp.float64(0.4)})],
)
def test_symmetric_payoffs_equal_enumeration_of_every_outcome(keep, utility, theta):
    # three players, k = 2: both opponents play sigma; ties (e.g. every bust banks 0) occur
    sigma = STRATEGIES[0]
    g = game(keep, utility, theta)
    expected = enumerated_payoffs([sigma, sigma], keep, resolve_utility(utility), theta)
    assert np.asarray(target_payoffs(g, sigma)) == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_payoffs_against_different_opponents_equal_enumeration():
    g = game(1.0)
    expected = enumerated_payoffs(STRATEGIES, 1.0, resolve_utility("linear"), {})
    got = np.asarray(target_payoffs_profile(g, jnp.asarray(np.stack(STRATEGIES))))
    assert got == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_payoffs_agree_with_a_monte_carlo_contest():
    # simulation of 400,000 three-player contests with a random tie-break order; the
    # mean payoff of player 0 by own target within 4 standard errors of the game's value
    rng = np.random.default_rng(11)
    n = 400_000
    sigma = STRATEGIES[0]
    targets = rng.choice(CAP + 1, size=(n, 3), p=sigma)
    first_bust = rng.geometric(1 - P, size=(n, 3)) - 1  # successes before the first bust
    banks = np.where(first_bust >= targets, targets, 0).astype(float)
    tie_break = rng.random((n, 3))
    above = (banks[:, 1:] > banks[:, :1]) | (
        (banks[:, 1:] == banks[:, :1]) & (tie_break[:, 1:] > tie_break[:, :1])
    )
    paid = np.where(above.sum(axis=1) < K, PRIZE / K, 0.0) + banks[:, 0]  # keep bank
    payoffs = np.asarray(target_payoffs(game(1.0), sigma))
    for t in range(CAP + 1):
        mine = paid[targets[:, 0] == t]
        se = mine.std(ddof=1) / math.sqrt(len(mine))
        assert abs(mine.mean() - payoffs[t]) <= 4 * se


def test_k_equal_one_reduces_to_the_winner_closed_form_also_with_ties():
    # the closed form (a^N - b^N) / (N e) of game.py against the quadrature rule at k = 1,
    # on slots with large tie probabilities, where the tie-break term changes the answer
    g = make_numpy_game(P, 4, PRIZE, 0.0, CAP)
    f = np.array([0.05, 0.3, 0.0, 0.1, 0.25, 0.2, 0.1])  # opponent slot distribution
    closed = np.asarray(win_prob_symmetric(g, f))
    quadrature = share_prob_symmetric(np, f @ g.below, f @ g.equal, 4.0, 1)
    assert quadrature == pytest.approx(closed, rel=1e-12, abs=1e-14)
    no_ties = share_prob_symmetric(np, f @ g.below, 0.0 * (f @ g.equal), 4.0, 1)
    assert np.max(np.abs(no_ties - closed)) > 1e-2  # ties matter on these slots


@pytest.mark.parametrize(
    ("spec", "theta"),
    [
        ("linear+qre", {"precision": 1.5}),
        ("crra+qre", {"r": 0.3, "precision": 2.0}),
        ("crra+levelk", {"r": 0.3, "precision": 2.0, "level": 0.5}),
        ("crra+ch", {"r": 0.3, "precision": 2.0, "tau": 1.5}),
    ],
)
@pytest.mark.slow
def test_solvers_answers_are_certified_and_check_against_enumerated_payoffs(spec, theta):
    answer = counterfactual(
        {"model": spec, "params": theta, "max_target": CAP},
        [{"players": 3, "prize": PRIZE, "keep_bank": True, "p_survive": P, "top_k": K}],
    )
    table, plot = answer.table, answer.plot_frame
    assert table["certified"].all() and (table["top_k"] == K).all()
    utility = resolve_utility(spec.split("+")[0])
    theta_jax = {k: jnp.float64(v) for k, v in theta.items()}

    def sigma_of(nash: bool) -> np.ndarray:
        rows = plot[(plot["prediction"] == "nash") == nash]
        return rows.sort_values("target")["prob"].to_numpy()

    # Nash: its max regret recomputed from the enumerated payoffs (Nash 1951 best-response
    # condition, common practice, no source)
    sigma = sigma_of(True)
    u = enumerated_payoffs([sigma, sigma], 1.0, utility, theta_jax)
    assert u.max() - sigma @ u <= 1e-8
    assert table.iloc[0]["max_regret"] == pytest.approx(u.max() - sigma @ u, abs=1e-9)
    model_sigma = sigma_of(False)
    u = enumerated_payoffs([model_sigma, model_sigma], 1.0, utility, theta_jax)
    assert table.iloc[1]["max_regret"] == pytest.approx(u.max() - model_sigma @ u, abs=1e-9)
    if spec.endswith("qre"):  # logit QRE fixed point sigma = softmax(lambda U(sigma))
        # (McKelvey & Palfrey 1995) with U from the enumeration
        logit = np.exp(theta["precision"] * (u - u.max()))
        assert model_sigma == pytest.approx(logit / logit.sum(), abs=1e-8)


def test_a_shared_prize_needs_more_players_than_places():
    with pytest.raises(StopwiseInputError, match="top_k"):
        counterfactual(
            {"model": "linear+qre", "params": {"precision": 1.0}, "max_target": CAP},
            [{"players": 2, "prize": PRIZE, "p_survive": P, "top_k": 2}],
        )
