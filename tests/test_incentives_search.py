"""The derivative-steered prize search (issue 21) against brute-force enumeration of a fine
prize grid, with the optimum on a limit's boundary and in the interior; the root-finders on
functions where their shortcuts (one-sided Newton, stalled secant) change the answer.

The fitted parameters are invented for the tests (no data); the fine-grid predictions are
computed here from the model's target distribution with numpy, not by stopwise.incentives.
"""

from __future__ import annotations

import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.contest import design_incentives
from stopwise.incentives_search import bracketed_newton, stationary_point
from stopwise.models.spec import build_model

FIT = {"model": "crra+qre", "params": {"r": 0.3, "precision": 2.0}, "max_target": 8}
P = 0.8


def fine_grid(players: int, top_k: int, keep: bool, prizes: np.ndarray) -> dict[str, np.ndarray]:
    """Expected total bank and bust rate of the fitted play at every prize (brute force)."""
    model = build_model("crra+qre", max_target=8)
    solve = model.options["target_distribution"]
    t = np.arange(9)
    bank, bust = [], []
    for x in prizes:
        sigma = np.asarray(
            solve(FIT["params"], P, players, x, float(keep), 8, 1.0, 0.0, 0.0, top_k)
        )
        sigma = sigma / sigma.sum()
        bank.append(players * sigma @ (t * P**t))  # reach t with p^t, a bust banks 0
        bust.append(sigma @ (1 - P**t))
    return {"total_bank": np.array(bank), "bust_rate": np.array(bust)}


@pytest.mark.slow  # a fine grid of 361 solves (about a minute on two shared cores)
def test_optimum_on_the_bust_limit_equals_the_fine_grid_and_sits_on_the_boundary():
    # three players, winner takes the prize: total bank and bust rate both rise with the
    # prize, so the best prize under the bust limit is where the limit binds
    limit = 0.55
    result = design_incentives(
        FIT,
        "efficiency",
        (1.0, 10.0),
        players=(3,),
        schemes=("winner",),
        max_bust=limit,
        grid_points=4,
    )
    choice = result.choice
    prizes = np.linspace(1.0, 10.0, 361)
    grid = fine_grid(3, 1, False, prizes)
    ok = grid["bust_rate"] <= limit
    best = int(np.argmax(np.where(ok, grid["total_bank"], -np.inf)))
    assert ok.any() and not ok.all()  # the limit cuts the range
    assert abs(choice["prize"] - prizes[best]) <= prizes[1] - prizes[0]
    assert choice["model"]["goal_value"] >= grid["total_bank"][best] - 1e-12
    assert choice["model"]["bust_rate"] <= limit
    assert limit - choice["model"]["bust_rate"] <= 1e-9  # exactly on the boundary
    grid_only = design_incentives(
        FIT,
        "efficiency",
        (1.0, 10.0),
        players=(3,),
        schemes=("winner",),
        max_bust=limit,
        grid_points=4,
        refine_steps=0,
    )
    assert choice["model"]["goal_value"] > grid_only.choice["model"]["goal_value"] + 1e-4


@pytest.mark.slow  # a fine grid of 361 solves
def test_interior_optimum_equals_the_fine_grid_and_is_stationary():
    # prize shared by the top two of three: the total bank peaks inside the range
    result = design_incentives(
        FIT, "efficiency", (1.0, 10.0), players=(3,), schemes=("top2",), grid_points=4
    )
    choice = result.choice
    prizes = np.linspace(1.0, 10.0, 361)
    grid = fine_grid(3, 2, False, prizes)
    best = int(np.argmax(grid["total_bank"]))
    assert 0 < best < len(prizes) - 1  # interior
    assert abs(choice["prize"] - prizes[best]) <= prizes[1] - prizes[0]
    assert choice["model"]["goal_value"] >= grid["total_bank"][best] - 1e-12
    assert abs(choice["prize_derivative"]["derivative"]) <= 1e-8


def test_one_sided_newton_still_returns_a_point_on_the_kept_side_next_to_the_root():
    # v(x) = exp(x) - e is convex and increasing: Newton from the right end approaches the
    # root x = 1 from the right only, so the kept end would stay at 0 without the landing
    calls = []

    def value(x: float) -> float:
        calls.append(x)
        return float(np.exp(x) - np.e)

    x = bracketed_newton(value, lambda x: float(np.exp(x)), 0.0, 3.0, 40, 1e-12)
    assert value(x) <= 0.0 and 1.0 - x <= 1e-10
    assert all(c >= 1.0 for c in calls[2:-2])  # the iterates stayed on the far side


def test_secant_with_a_stalled_end_converges_to_the_stationary_point():
    # slope of -(x - 0.3)^4 - x: one end of a plain regula falsi would never move; the
    # Illinois halving moves it. Stationary point: 4 (x - 0.3)^3 = -1
    def slope(x: float) -> float:
        return -4.0 * (x - 0.3) ** 3 - 1.0

    root = 0.3 - 0.25 ** (1.0 / 3.0)
    found = stationary_point(slope, -2.0, 2.0, 60)
    assert found == pytest.approx(root, abs=1e-10)
    assert stationary_point(lambda x: 1.0, 0.0, 1.0, 10) is None  # no sign change
