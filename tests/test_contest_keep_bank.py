"""Keep-bank contests, where the two-player reduction matters: against nashpy, a direct
best-response check on the full payoff matrix built here from the contest's rules, and (3 and
4 players) an independent Monte Carlo of the payoffs."""

from __future__ import annotations

import warnings

import nashpy
import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.contest import equilibrium

PRIZES = (0.5, 1.0, 5.0, 10.0, 100.0)
SURVIVAL = (0.8, 0.9, 0.95)


def rules_payoff_matrix(p: float, prize: float, cap: int) -> np.ndarray:
    """M[t, s]: expected money of a player aiming for t against a rival aiming for s, written
    from the rules (gain 1, start 0, a bust loses the bank; keep bank + prize to the top bank,
    ties split evenly): X_t = t with probability p^t, else 0;
    M = E[X_t] + prize (P(X_t > X_s) + P(X_t = X_s) / 2)."""
    t = np.arange(cap + 1, dtype=float)
    reach = p**t
    zero = np.where(t == 0, 1.0, 1.0 - reach)  # P(X_t = 0)
    own, rival = t[:, None], t[None, :]
    beats = np.where(own >= 1, reach[:, None] * np.where(rival < own, 1.0, zero[None, :]), 0.0)
    level = zero[:, None] * zero[None, :] + np.where((own == rival) & (own >= 1), reach**2, 0.0)
    return (t * reach)[:, None] + prize * (beats + 0.5 * level)


def test_rules_matrix_agrees_with_the_definition_by_enumeration():
    # The test's own matrix against a brute-force enumeration of the four outcome pairs
    # (definition of the contest in DESIGN.md; common practice, no source).
    p, prize, cap = 0.85, 3.0, 6
    m = rules_payoff_matrix(p, prize, cap)
    for t in range(cap + 1):
        for s in range(cap + 1):
            value = 0.0
            for x, px in ((t, p**t), (0, 1 - p**t)):
                for y, py in ((s, p**s), (0, 1 - p**s)):
                    win = 1.0 if x > y else 0.5 if x == y else 0.0
                    value += px * py * (x + prize * win)
            assert m[t, s] == pytest.approx(value, abs=1e-12)


def _reduced(m: np.ndarray, dominated: list[int]) -> tuple[np.ndarray, list[int]]:
    keep = [t for t in range(m.shape[0]) if t not in set(dominated)]
    return m[np.ix_(keep, keep)], keep


@pytest.mark.parametrize("p", SURVIVAL)
@pytest.mark.parametrize("prize", PRIZES)
def test_two_player_keep_bank_nash_against_nashpy_and_best_responses(p, prize):
    result = equilibrium(p, 2, prize, keep_bank=True)
    sigma = np.array(result["probs"])
    m = rules_payoff_matrix(p, prize, result["cap"])
    span = np.ptp(m)
    assert result["certified"] and result["method"] == "zero-sum LP"
    # Direct best-response check on the full, unreduced matrix built above from the rules
    # (definition of Nash equilibrium; common practice, no source).
    u = m @ sigma
    assert u.max() - sigma @ u <= 1e-9 * span
    assert result["max_regret"] == pytest.approx(max(0.0, u.max() - sigma @ u), abs=1e-9 * span)
    # nashpy (Knight & Campbell 2018) on the dominance-reduced matrix: up to 7 surviving
    # targets its support enumeration of the bimatrix game (M, M^T) must list ours; beyond
    # that (where its enumeration takes minutes) its minimax LP on the zero-sum game
    # M[t, s] - E[X_s] - prize / 2 (the rival-only term, since M + M^T = E[X_t] + E[X_s] +
    # prize), written here from the rules, must return ours (1e-7).
    reduced, keep = _reduced(m, result["dominated"])
    assert set(np.flatnonzero(sigma > 1e-12)) <= set(keep)
    ours = sigma[keep]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if len(keep) <= 7:
            game = nashpy.Game(reduced, reduced.T)
            theirs = [x for x, y in game.support_enumeration() if np.allclose(x, y, atol=1e-9)]
        else:
            t = np.array(keep, dtype=float)
            zero_sum = reduced - (t * p**t)[None, :] - prize / 2.0
            theirs = [nashpy.Game(zero_sum, -zero_sum).linear_program()[0]]
    assert any(np.allclose(ours, x, atol=1e-7) for x in theirs)


def test_keep_bank_prize_changes_the_two_player_equilibrium():
    # The reported symptom of issue 11: with the own-target term removed, prize 1 and prize
    # 100 gave the same distribution. At p = 0.9 the prize-1 answer lies on targets 9-11
    # (iterated dominance leaves only these; rules matrix above) and differs from prize 100.
    low = equilibrium(0.9, 2, 1.0, keep_bank=True)
    high = equilibrium(0.9, 2, 100.0, keep_bank=True)
    support = set(np.flatnonzero(np.array(low["probs"]) > 1e-12))
    assert support <= {9, 10, 11} and low["certified"]
    assert not np.allclose(low["probs"], high["probs"], atol=1e-3)


def _monte_carlo_payoffs(p, players, prize, sigma, rng, contests):
    """Expected money of each own target t against players-1 rivals drawn from sigma, by
    simulation with common rival draws: (mean, standard error) per target."""
    cap = len(sigma) - 1
    targets = rng.choice(cap + 1, size=(contests, players - 1), p=sigma)
    survive = rng.random((contests, players - 1)) < p**targets
    rival_best = np.max(np.where(survive, targets, 0), axis=1)
    ties_rivals = np.sum(np.where(survive, targets, 0) == rival_best[:, None], axis=1)
    own_survive = rng.random(contests)
    means, ses = np.zeros(cap + 1), np.zeros(cap + 1)
    for t in range(cap + 1):
        bank = np.where(own_survive < p**t, float(t), 0.0)
        win = np.where(
            bank > rival_best, 1.0, np.where(bank == rival_best, 1.0 / (1 + ties_rivals), 0.0)
        )
        money = bank + prize * win
        means[t], ses[t] = money.mean(), money.std(ddof=1) / np.sqrt(contests)
    return means, ses


@pytest.mark.parametrize(("players", "prize"), [(3, 10.0), (4, 5.0)])
def test_three_and_four_player_keep_bank_by_monte_carlo(players, prize):
    # The symmetric solver's certificate, then an independent numpy Monte Carlo of 10^6
    # contests: every support target earns the same expected money within 4 standard errors
    # and no target outside earns more (definition of a symmetric mixed equilibrium; common
    # practice, no source). Cap 25 keeps the simulation small (p^25 = 0.07% at p = 0.75).
    p = 0.75
    result = equilibrium(p, players, prize, keep_bank=True, max_target=25)
    assert result["certified"] and result["max_regret_share"] <= 1e-6
    sigma = np.array(result["probs"])
    means, ses = _monte_carlo_payoffs(p, players, prize, sigma, np.random.default_rng(11), 10**6)
    support = np.flatnonzero(sigma > 1e-6)
    value = float(sigma @ means)
    for t in support:
        assert abs(means[t] - value) <= 4 * np.hypot(ses[t], ses[support].max())
    outside = np.setdiff1d(np.arange(len(sigma)), support)
    assert np.all(means[outside] <= value + 4 * ses[outside])
