"""Risk attitude in sequential contests: CRRA movers in the exact solver, the logit solver,
the command line and the simulator.

Outside check: a brute force written here enumerates every target of each mover with
expected CRRA utility u(x) = (x^(1-r) - 1)/(1-r) of the money (common practice, no source),
independent of the package's stopping recursion.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from stopwise import cli
from stopwise.contest_sequential import sequential_equilibrium
from stopwise.contest_sequential_sim import simulate_sequential
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.sequential import crra, make_sequential_game, solve_sequential
from stopwise.models.contest.sequential_qre import solve_sequential_logit


def u(x: float, r: float) -> float:
    """CRRA utility (common practice, no source)."""
    return (x ** (1.0 - r) - 1.0) / (1.0 - r)


def outcomes(p: float, t: int) -> list[tuple[float, float]]:
    """Final bank and probability of every end of aiming for t draws (gain 1, bust -> 0)."""
    return [(float(t), p**t)] + [(0.0, p**k * (1 - p)) for k in range(t)]


def second_values(p, prize, cap, rival, r):
    """Expected utility of every target of the second of two movers (keep own bank)."""
    values = []
    for t in range(cap + 1):
        v = 0.0
        for x, q in outcomes(p, t):
            win = 1.0 if x > rival else (0.5 if x == rival else 0.0)
            v += q * (win * u(x + prize, r) + (1 - win) * u(x, r))
        values.append(v)
    return np.array(values)


def first_values(p, prize, cap, r):
    """Expected utility of every first-mover target against the best response."""
    values = []
    for t1 in range(cap + 1):
        v = 0.0
        for x1, q1 in outcomes(p, t1):
            second = second_values(p, prize, cap, x1, r)
            t2 = int(np.flatnonzero(second >= second.max() - 1e-12)[0])
            win = sum(
                q2 * (1.0 if x1 > x2 else (0.5 if x1 == x2 else 0.0)) for x2, q2 in outcomes(p, t2)
            )
            v += q1 * (win * u(x1 + prize, r) + (1 - win) * u(x1, r))
        values.append(v)
    return np.array(values)


P, PRIZE, CAP = 0.85, 4.0, 25


def solved(r):
    game = make_sequential_game(P, 2, PRIZE, True, CAP, utility=crra(r))
    return game, solve_sequential(game)


def test_risk_aversion_changes_the_first_movers_target():
    # where the shortcut matters: CRRA r = 0.6 gives another target than risk neutrality
    assert solved(0.6)[1].targets[0][0, 0] != solved(None)[1].targets[0][0, 0]


@pytest.mark.parametrize("r", [0.6, -0.5])
def test_crra_solution_matches_brute_force(r):
    game, solution = solved(r)
    brute = first_values(P, PRIZE, CAP, r)
    assert solution.values[0][0, 0] == pytest.approx(brute.max(), abs=1e-10)
    assert brute[solution.targets[0][0, 0]] == pytest.approx(brute.max(), abs=1e-10)
    for b, rival in enumerate(game.score_values):
        second = second_values(P, PRIZE, CAP, rival, r)
        assert solution.values[1][b + 1, 1] == pytest.approx(second.max(), abs=1e-10)


def test_logit_play_with_crra_is_the_exact_rule_at_high_precision():
    game, solution = solved(0.6)
    logit = solve_sequential_logit(game, 1e4)
    target = solution.targets[0][0, 0]
    stop = logit.stop_probs[0][0, 0]
    assert stop[target] > 1 - 1e-6
    assert np.all(stop[:target] < 1e-6)


def test_equilibrium_command_takes_r_with_sequential(tmp_path):
    out = tmp_path / "seq.json"
    args = ["equilibrium", "--p-survive", "0.85", "--players", "2", "--prize", "4"]
    args += ["--keep-bank", "--max-target", "25", "--sequential", "--r", "0.6"]
    assert cli.main([*args, "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    assert result["certified"] and result["r"] == 0.6
    assert result["first_mover"]["target"] == solved(0.6)[1].targets[0][0, 0]
    direct = sequential_equilibrium(0.85, 2, 4.0, keep_bank=True, max_target=25, r=0.6)
    assert direct["movers"] == result["movers"]


def test_r_of_one_or_more_is_refused():
    with pytest.raises(StopwiseInputError, match="below 1"):
        crra(1.0)


def test_simulated_crra_first_movers_stop_at_the_crra_target():
    frame = simulate_sequential(
        P, 2, PRIZE, groups=100, trials=5, keep_bank=True, max_target=CAP, seed=3, r=0.6
    )
    first = frame[frame["order"] == 1]
    target = solved(0.6)[1].targets[0][0, 0]
    assert target != solved(None)[1].targets[0][0, 0]
    assert (first.loc[first["busted"] == 0, "draws"] == target).all()
    assert (first["draws"] <= target).all()
