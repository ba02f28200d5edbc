"""Sequential contests (issue 19): the backward-induction solution against a brute-force
enumeration written here and a numpy Monte Carlo, its certificate, and the command line.

Outside checks: the rules of the game (top bank wins, ties split by a fair draw, a bust keeps
bust_keep of the bank) are the problem statement of issue 19; the brute force enumerates every
target's exact win probability from the Bernoulli survival law (common practice, no source);
the Monte Carlo uses numpy's geometric sampler (numpy.random.Generator.geometric) and a 4
standard-error band (common practice, no source).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from stopwise import cli
from stopwise.contest_sequential import max_regret, sequential_equilibrium
from stopwise.contest_sequential_sim import simulate_sequential
from stopwise.data_schemas.validate import validate
from stopwise.models.contest.certify import UncertifiedAnswer
from stopwise.models.contest.game import default_max_target
from stopwise.models.contest.sequential import (
    NONE,
    make_sequential_game,
    mover_summaries,
    outcome_matrix,
    solve_sequential,
    target_values,
)
from stopwise.models.contest.sequential_qre import logit_mover_summaries, solve_sequential_logit

# --- brute force, independent of the solver: lists of (score, probability) per target ---


def brute_outcomes(p: float, t: int, gain: float, start: float, bust_keep: float) -> list:
    """Final bank and probability of every way aiming for t draws can end."""
    out = [(start + t * gain, p**t)]
    out += [(bust_keep * (start + k * gain), p**k * (1 - p)) for k in range(t)]
    return out


def brute_second_mover(p, prize, keep, cap, rival, gain=1.0, start=0.0, bust_keep=0.0):
    """Value of every target of the last of two movers facing a rival's bank: win if above,
    half the prize if equal (fair draw), plus the own bank with keep."""
    values = []
    for t in range(cap + 1):
        v = 0.0
        for x, q in brute_outcomes(p, t, gain, start, bust_keep):
            win = 1.0 if x > rival + 1e-9 else (0.5 if abs(x - rival) <= 1e-9 else 0.0)
            v += q * (keep * x + prize * win)
        values.append(v)
    return np.array(values)


def brute_first_mover(p, prize, keep, cap, gain=1.0, start=0.0, bust_keep=0.0):
    """Value of every first-mover target when the second mover best-responds (brute force);
    among equally good responses the second mover takes the smallest target."""
    values = []
    for t1 in range(cap + 1):
        v = 0.0
        for x1, q1 in brute_outcomes(p, t1, gain, start, bust_keep):
            second = brute_second_mover(p, prize, keep, cap, x1, gain, start, bust_keep)
            best = second.max()
            t2 = int(np.flatnonzero(second >= best - 1e-12 * max(prize, 1.0))[0])
            win = 0.0
            for x2, q2 in brute_outcomes(p, t2, gain, start, bust_keep):
                if x1 > x2 + 1e-9:
                    win += q2
                elif abs(x1 - x2) <= 1e-9:
                    win += 0.5 * q2
            v += q1 * (keep * x1 + prize * win)
        values.append(v)
    return np.array(values)


SETTINGS = [
    # p, prize, keep_bank, cap, bust_keep
    (0.9, 10.0, False, 30, 0.0),
    (0.9, 10.0, True, 30, 0.0),
    (0.7, 3.0, False, 20, 0.5),
    (0.8, 2.0, True, 20, 0.5),
]


@pytest.mark.parametrize("p, prize, keep, cap, bust_keep", SETTINGS)
def test_second_mover_matches_brute_force(p, prize, keep, cap, bust_keep):
    game = make_sequential_game(p, 2, prize, keep, cap, 1.0, 0.0, bust_keep)
    solution = solve_sequential(game)
    for b, rival in enumerate(game.score_values):
        brute = brute_second_mover(p, prize, float(keep), cap, rival, bust_keep=bust_keep)
        target = solution.targets[1][b + 1, 1]
        assert solution.values[1][b + 1, 1] == pytest.approx(brute.max(), abs=1e-10)
        assert brute[target] == pytest.approx(brute.max(), abs=1e-10)


@pytest.mark.parametrize("p, prize, keep, cap, bust_keep", SETTINGS)
def test_first_mover_matches_brute_force(p, prize, keep, cap, bust_keep):
    game = make_sequential_game(p, 2, prize, keep, cap, 1.0, 0.0, bust_keep)
    solution = solve_sequential(game)
    brute = brute_first_mover(p, prize, float(keep), cap, bust_keep=bust_keep)
    target = solution.targets[0][0, 0]
    assert solution.values[0][0, 0] == pytest.approx(brute.max(), abs=1e-10)
    assert brute[target] == pytest.approx(brute.max(), abs=1e-10)


def test_winner_takes_all_second_mover_draws_until_strictly_ahead():
    """Issue 19's threshold rule: behind or tied, draw until strictly ahead (p = 0.9: one more
    draw wins with 0.9 > the tie's half); ahead, stop (winner-takes-all)."""
    game = make_sequential_game(0.9, 2, 10.0, False, 40)
    solution = solve_sequential(game)
    for b, rival in enumerate(game.score_values[:20]):
        assert solution.targets[1][b + 1, 1] == int(rival) + 1


# --- Monte Carlo of the whole solution ---


def simulate_contests(game, solution, n, rng):
    """numpy Monte Carlo of n contests played by the solution's rules; returns banks (n, N)
    and the winner of each contest (ties broken by a uniform draw)."""
    p, players = game.p_survive, game.players
    values = game.score_values
    best = np.full(n, NONE)
    tied = np.zeros(n, dtype=int)
    banks = np.zeros((n, players))
    for j in range(players):
        target = solution.targets[j][best + 1, tied]
        assert np.all(target >= 0)
        successes = rng.geometric(1.0 - p, size=n) - 1
        reached = successes >= target
        bank = np.where(reached, target * 1.0, 0.0)  # gain 1, start 0, bust_keep 0
        banks[:, j] = bank
        index = np.searchsorted(values, bank - 1e-9)
        ahead = (best == NONE) | (index > best)
        equal = ~ahead & (index == best)
        tied = np.where(ahead, 1, np.where(equal, tied + 1, tied))
        best = np.where(ahead, index, best)
    top = banks == banks.max(axis=1, keepdims=True)
    winner = np.argmax(top * rng.random(banks.shape), axis=1)
    return banks, winner


@pytest.mark.parametrize("players, keep", [(2, False), (2, True), (3, False)])
def test_solution_matches_monte_carlo(players, keep):
    n = 1_000_000
    result = sequential_equilibrium(
        0.9, players, 10.0, keep_bank=keep, max_target=60, compare=False
    )
    game = make_sequential_game(0.9, players, 10.0, keep, 60)
    solution = solve_sequential(game)
    banks, winner = simulate_contests(game, solution, n, np.random.default_rng(19))
    for j, mover in enumerate(result["movers"]):
        wins = winner == j
        se_win = np.sqrt(mover["win_prob"] * (1 - mover["win_prob"]) / n)
        assert abs(wins.mean() - mover["win_prob"]) <= 4 * se_win
        se_bank = banks[:, j].std() / np.sqrt(n)
        assert abs(banks[:, j].mean() - mover["expected_bank"]) <= 4 * se_bank
        se_bust = np.sqrt(mover["bust_rate"] * (1 - mover["bust_rate"]) / n)
        busts = banks[:, j] == 0  # every target here is >= 1, so bank 0 means a bust
        assert abs(busts.mean() - mover["bust_rate"]) <= 4 * se_bust


def test_win_probabilities_sum_to_one_and_certificate_holds():
    result = sequential_equilibrium(0.85, 3, 4.0, keep_bank=True, max_target=40, compare=False)
    assert sum(m["win_prob"] for m in result["movers"]) == pytest.approx(1.0, abs=1e-12)
    assert result["certified"]
    assert result["max_regret_share"] <= 1e-9


def test_certificate_detects_a_wrong_rule():
    """Replacing the second mover's rule by a worse target makes the regret positive."""
    game = make_sequential_game(0.9, 2, 10.0, False, 30)
    solution = solve_sequential(game)
    assert max_regret(solution)[0] < 1e-9
    solution.targets[1][1, 1] = 0  # rival busted: stopping at 0 only ties
    _, mismatch = max_regret(solution)
    assert mismatch > 1.0  # V says draw once (win 0.9 x 10); target 0 gets 5


def test_uncertified_answer_refused():
    with pytest.raises(UncertifiedAnswer):
        sequential_equilibrium(0.9, 2, 10.0, max_target=30, tolerance=1e-300, compare=False)


def test_sequential_compares_with_simultaneous():
    result = sequential_equilibrium(0.9, 2, 10.0, max_target=60)
    simultaneous = result["simultaneous"]
    assert simultaneous["certified"]
    assert simultaneous["win_prob"] == pytest.approx(0.5, abs=1e-12)  # symmetric play
    total = sum(m["expected_bank"] for m in result["movers"])
    solo = max(t * 0.9**t for t in range(61))
    assert result["efficiency_loss"] == pytest.approx(1 - total / (2 * solo), abs=1e-12)


# --- command line ---


def test_cli_sequential_prints_response_table(tmp_path, capsys):
    out = tmp_path / "seq.json"
    args = ["equilibrium", "--p-survive", "0.9", "--players", "2", "--prize", "10"]
    assert cli.main([*args, "--sequential", "--max-target", "40", "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "first mover: target 6" in text
    assert "rival_bank" in text and "CERTIFIED" in text
    saved = json.loads(out.read_text())
    assert saved["first_mover"]["target"] == 6
    seen = {(r["rival_bank"], r["target"]) for r in saved["responses"] if r["prob_seen"] > 0}
    assert seen == {(0.0, 1), (6.0, 7)}


@pytest.mark.parametrize(
    "extra", [["--precision", "1"], ["--concept", "qre"], ["--tau", "1"], ["--players", "7"]]
)
def test_cli_sequential_refuses_unused_options(tmp_path, extra):
    out = tmp_path / "seq.json"
    base = ["equilibrium", "--p-survive", "0.9", "--prize", "10", "--sequential"]
    players = [] if "--players" in extra else ["--players", "2"]
    assert cli.main([*base, *players, *extra, "--json", str(out)]) == 2
    assert not out.exists()


# --- agent logit QRE at every node ---


@pytest.mark.parametrize("keep", [False, True])
def test_logit_play_at_high_precision_is_the_exact_solution(keep):
    """In every state where the best target is unique by a margin (so every node on its path
    is strict), logit play at lambda = 1e5 plays it; two-player summaries agree. (p = 0.85:
    at p = 0.9 the solo targets 9 and 10 tie exactly, 9 p^9 = 10 p^10.)"""
    game = make_sequential_game(0.85, 3, 10.0, keep, 40)
    exact = solve_sequential(game)
    logit = solve_sequential_logit(game, 1e5)
    q = outcome_matrix(game)
    checked = skipped = 0
    for j in range(3):
        for b_plus, c in zip(*np.nonzero(exact.targets[j] >= 0)):
            values = np.sort(target_values(game, exact, j, int(b_plus) - 1, int(c), q))
            if values[-1] - values[-2] < 1e-3:
                skipped += 1
                continue
            dist = logit.outcomes[j][b_plus, c]
            assert np.abs(dist - q[exact.targets[j][b_plus, c]]).max() < 1e-6
            checked += 1
    assert checked >= 9 * skipped
    two = make_sequential_game(0.85, 2, 10.0, keep, 40)
    pairs = zip(
        logit_mover_summaries(solve_sequential_logit(two, 1e5)),
        mover_summaries(solve_sequential(two)),
    )
    for a, b in pairs:
        assert a["expected_bank"] == pytest.approx(b["expected_bank"], abs=1e-6)
        assert a["win_prob"] == pytest.approx(b["win_prob"], abs=1e-6)


def test_logit_play_at_zero_precision_is_uniform():
    """lambda = 0 stops with probability 1/2 at every node: P(bank k) = (p/2)^k / 2 below the
    cap (geometric law, common practice, no source), whatever the mover saw."""
    p, cap = 0.8, 25
    game = make_sequential_game(p, 2, 10.0, False, cap)
    logit = solve_sequential_logit(game, 0.0)
    expected_bust = sum((p / 2) ** k * 0.5 * (1 - p) for k in range(cap))
    for j, b_plus, c in [(0, 0, 0), (1, 3, 1), (1, 10, 1)]:
        stops = logit.stop_probs[j][b_plus, c]
        assert np.allclose(stops[:cap], 0.5) and stops[cap] == 1.0
        assert logit.bust[j][b_plus, c] == pytest.approx(expected_bust, abs=1e-12)
        dist = logit.outcomes[j][b_plus, c]
        for k in range(1, 5):  # bank k > 0 is reached only by stopping there
            assert dist[game.reach_index[k]] == pytest.approx((p / 2) ** k / 2, abs=1e-12)


def test_logit_play_matches_monte_carlo():
    """numpy Monte Carlo of 10^6 two-player contests with logit stopping at every node."""
    p, cap, n = 0.9, 30, 1_000_000
    game = make_sequential_game(p, 2, 10.0, False, cap)
    logit = solve_sequential_logit(game, 0.7)
    rng = np.random.default_rng(7)
    banks = np.zeros((n, 2))
    best = np.full(n, NONE)
    for j in range(2):
        stops = logit.stop_probs[j][best + 1, np.where(best == NONE, 0, 1)]
        alive = np.ones(n, dtype=bool)
        level = np.zeros(n, dtype=int)
        bust = np.zeros(n, dtype=bool)
        for k in range(cap + 1):
            stopping = alive & (rng.random(n) < stops[:, k])
            alive &= ~stopping
            drawing = alive.copy()
            survive = rng.random(n) < p
            bust |= drawing & ~survive
            alive &= survive
            level = np.where(alive, k + 1, level)
            level = np.where(stopping, k, level)
        banks[:, j] = np.where(bust, 0.0, level)
        best = np.searchsorted(game.score_values, banks[:, 0] - 1e-9)
    top = banks == banks.max(axis=1, keepdims=True)
    winner = np.argmax(top * rng.random(banks.shape), axis=1)
    for j, mover in enumerate(logit_mover_summaries(logit)):
        se = banks[:, j].std() / np.sqrt(n)
        assert abs(banks[:, j].mean() - mover["expected_bank"]) <= 4 * se
        w = mover["win_prob"]
        assert abs((winner == j).mean() - w) <= 4 * np.sqrt(w * (1 - w) / n)


def test_cli_sequential_logit(tmp_path, capsys):
    out = tmp_path / "aqre.json"
    args = ["equilibrium", "--p-survive", "0.9", "--players", "2", "--prize", "10"]
    extra = ["--sequential", "--concept", "aqre", "--precision", "2", "--max-target", "40"]
    assert cli.main([*args, *extra, "--json", str(out)]) == 0
    assert "sequential agent logit play" in capsys.readouterr().out
    saved = json.loads(out.read_text())
    assert saved["certified"]
    game = make_sequential_game(0.9, 2, 10.0, False, 40)
    direct = logit_mover_summaries(solve_sequential_logit(game, 2.0))
    assert saved["movers"][1]["win_prob"] == pytest.approx(direct[1]["win_prob"], abs=1e-12)
    assert cli.main([*args, "--sequential", "--concept", "aqre", "--json", str(out)]) == 2


# --- invented sequential data ---


@pytest.mark.parametrize("precision", [None, 0.5])
def test_simulated_sequential_data_validate_and_match_the_solution(precision):
    frame = simulate_sequential(0.85, 2, 5.0, groups=20, trials=5, precision=precision, seed=3)
    report = validate(frame)
    assert report.ok, report.format()
    big = simulate_sequential(0.85, 2, 5.0, groups=1000, trials=200, precision=precision, seed=4)
    game = make_sequential_game(0.85, 2, 5.0, False, default_max_target(0.85))
    solved = (
        mover_summaries(solve_sequential(game))
        if precision is None
        else logit_mover_summaries(solve_sequential_logit(game, precision))
    )
    for j, mover in enumerate(solved):
        rows = big[big["order"] == j + 1]
        bank = np.where(rows["busted"] == 1, 0.0, rows["draws"])
        assert abs(bank.mean() - mover["expected_bank"]) <= 4 * bank.std() / np.sqrt(len(bank))
        b = mover["bust_rate"]
        assert abs(rows["busted"].mean() - b) <= 4 * np.sqrt(b * (1 - b) / len(rows))
