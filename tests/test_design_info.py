"""Expected information of a design (stopwise.estimation.design_info) against independent
computations: brute-force enumeration of every decision path of a tiny design, and the
empirical spread of estimates over simulated replications."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation import design_info as D
from stopwise.estimation.design_info import values_and_gradients

TINY_P = (0.5, 0.35)
PATH_DEPTH = 45  # 0.5^45 < 3e-14: the paths left out carry no visible mass


def enumerate_paths(p_survive: float, depth: int) -> list[list[tuple[int, str, str]]]:
    """Every path of one trial up to ``depth`` draws: stop after k successes, or bust on
    draw k + 1; each a list of (step, action, outcome)."""
    paths = []
    for k in range(depth):
        successes = [(s, "draw", "success") for s in range(k)]
        paths.append([*successes, (k, "stop", "")])
        paths.append([*successes, (k, "draw", "bust")])
    return paths


def brute_force_information(model, theta: dict[str, float], p_survive: float) -> np.ndarray:
    """sum over paths of P(path) * score score', the score from the per-row log-likelihood
    of the path loaded as ordinary data (stopwise.data_schemas.bundle) and P(path) =
    exp(loglik) * p^successes * (1 - p)^busts. Independent of the design module's recursion.
    The horizon is the design's cap: target models size their target set from it."""
    rows = []
    for trial, path in enumerate(enumerate_paths(p_survive, PATH_DEPTH), start=1):
        for step, action, outcome in path:
            rows.append((1, trial, step, p_survive, 1.0, action, outcome))
    frame = pd.DataFrame(
        rows, columns=["subject", "trial", "step", "p_survive", "gain", "action", "outcome"]
    )
    data = to_stopping_data(frame, horizon=PATH_DEPTH)
    thetas = D.theta_matrix(model, [theta])
    values, grads = values_and_gradients(model, thetas, data)
    trial = frame["trial"].to_numpy() - 1
    n_paths = trial.max() + 1
    loglik = np.bincount(trial, weights=values[0], minlength=n_paths)
    score = np.zeros((n_paths, thetas.shape[1]))
    np.add.at(score, trial, grads[0])
    successes = np.bincount(trial, weights=(frame["outcome"] == "success"), minlength=n_paths)
    busts = np.bincount(trial, weights=(frame["outcome"] == "bust"), minlength=n_paths)
    prob = np.exp(loglik) * p_survive**successes * (1 - p_survive) ** busts
    assert abs(prob.sum() - 1) < 1e-9  # the enumeration covers every path
    return np.einsum("n,ni,nj->ij", prob, score, score)


@pytest.mark.parametrize("spec", ["crra+planner+logit", "crra+target+logit", "crra+myopic+probit"])
def test_information_equals_expected_outer_product_of_path_scores(spec: str) -> None:
    """Guards the recursion I = sum_s R_s [d g g' + (1-d) h h'] (reach probabilities, the
    draw/stop split, the cap) against E[score score'] over all paths (the information
    identity, common practice, no source)."""
    model = stopwise.model(spec)
    theta = {**model.start_theta(), "r": 0.4}
    tables = D.path_tables(model, [theta], TINY_P, tolerance=0.5**PATH_DEPTH)
    assert tables.log_draw.shape[-1] == PATH_DEPTH  # same horizon, same target set
    info = D.condition_information(tables)[0]
    assert np.all(tables.truncated_mass < 1e-10)
    for c, p in enumerate(TINY_P):
        expected = brute_force_information(model, theta, p)
        np.testing.assert_allclose(info[c], expected, rtol=1e-7, atol=1e-12)


def test_information_is_refused_when_a_direction_is_not_identified() -> None:
    """A singular information matrix gives no SEs (identified False), not a huge number."""
    singular = np.array([[1.0, 2.0], [2.0, 4.0]])
    result = D.precision_from_information(("a", "b"), singular)
    assert not result.identified
    assert np.all(np.isnan(result.se_one))
    regular = D.precision_from_information(("a", "b"), np.array([[4.0, 0.0], [0.0, 1.0]]))
    np.testing.assert_allclose(regular.se_one, [0.5, 1.0])
    np.testing.assert_allclose(regular.se_pooled(25), [0.1, 0.2])
