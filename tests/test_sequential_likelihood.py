"""Fitting sequential contests: the likelihood of agent logit play at every decision node.

Outside checks: the likelihood of a tiny two-player contest is recomputed by enumerating
every path of play (scipy's expit), written here without the package's
recursions; the agent logit QRE is logit choice at every decision node with beliefs that
later nodes and movers play the same way (McKelvey & Palfrey 1998, agent QRE; from memory),
level-k with level-0 players choosing at random (Stahl & Wilson 1995, Nagel 1995; from
memory), and CRRA u(x) = (x^(1-r) - 1)/(1-r) (common practice, no source).
"""

from __future__ import annotations

import math
from dataclasses import replace

import jax
import numpy as np
import pandas as pd
import pytest
from scipy.special import expit

import stopwise
from stopwise.api import resolve_model
from stopwise.contest_sequential_sim import simulate_sequential
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.fit_checks import certify_sequential
from stopwise.models.spec import build_model

P, PRIZE, CAP, R, LAMBDA = 0.7, 5.0, 3, 0.4, 1.3


def crra(x: float, r: float = R) -> float:
    """CRRA utility (common practice, no source); u(0) = -1/(1-r) for r < 1."""
    return (x ** (1.0 - r) - 1.0) / (1.0 - r)


def paths(stop: list[float], p: float, cap: int) -> list[tuple[str, int, float]]:
    """Every complete path of one mover who stops at level k with probability stop[k]:
    (kind, k, probability), kind 'reach' (stopped with k successes) or 'bust' (after k)."""
    out = []
    for k in range(cap + 1):
        alive = math.prod((1.0 - stop[s]) * p for s in range(k))
        out.append(("reach", k, alive * stop[k]))
        if k < cap:
            out.append(("bust", k, alive * (1.0 - stop[k]) * (1.0 - p)))
    return out


def bank(kind: str, k: int) -> float:
    return float(k) if kind == "reach" else 0.0  # gain 1, start 0, bust_keep 0


def agent_logit(payoff, p: float, lam: float, cap: int) -> list[float]:
    """Stop probabilities of a mover whose money outcome pays payoff(kind, k): at node k the
    agent compares stopping with the expected payoff of every path after a draw, enumerated
    under the later nodes' (already fixed) stop probabilities."""
    stop = [1.0] * (cap + 1)
    for k in range(cap - 1, -1, -1):
        draw_value = (1.0 - p) * payoff("bust", k)
        # continuation after surviving draw k: every path from node k+1 on
        for j in range(k + 1, cap + 1):
            alive = math.prod((1.0 - stop[s]) * p for s in range(k + 1, j))
            draw_value += p * alive * stop[j] * payoff("reach", j)
            if j < cap:
                draw_value += p * alive * (1.0 - stop[j]) * (1.0 - p) * payoff("bust", j)
        stop[k] = float(expit(lam * (payoff("reach", k) - draw_value)))
    return stop


def second_mover_stop(rival: float) -> list[float]:
    """The second mover, who saw the first mover's final bank ``rival``: wins the prize when
    strictly ahead, half of it in expectation on a tie (fair draw), keeps the bank."""

    def payoff(kind: str, k: int) -> float:
        x = bank(kind, k)
        win = 1.0 if x > rival else (0.5 if x == rival else 0.0)
        return win * crra(x + PRIZE) + (1.0 - win) * crra(x)

    return agent_logit(payoff, P, LAMBDA, CAP)


def first_mover_stop(second_random: bool = False) -> list[float]:
    """The first mover: win chance from every path of the second mover's reply (the logit
    reply, or with ``second_random`` a level-0 reply stopping with probability 1/2 at every
    node below the cap)."""
    random_reply = [0.5] * CAP + [1.0]

    def payoff(kind: str, k: int) -> float:
        x = bank(kind, k)
        win = 0.0
        reply = random_reply if second_random else second_mover_stop(x)
        for kind2, k2, prob in paths(reply, P, CAP):
            y = bank(kind2, k2)
            win += prob * (1.0 if x > y else (0.5 if x == y else 0.0))
        return win * crra(x + PRIZE) + (1.0 - win) * crra(x)

    return agent_logit(payoff, P, LAMBDA, CAP)


def decision_rows(subject, group, trial, order, rival, actions) -> list[dict]:
    """Decision rows of one mover; actions: 'd' (draw, success), 'b' (draw, bust), 's'."""
    rows = []
    for step, a in enumerate(actions):
        rows.append(
            {
                "subject": subject,
                "trial": trial,
                "step": step,
                "p_survive": P,
                "gain": 1.0,
                "action": "stop" if a == "s" else "draw",
                "outcome": "" if a == "s" else ("bust" if a == "b" else "success"),
                "task": "contest",
                "group": group,
                "n_players": 2,
                "prize": PRIZE,
                "keep_bank": 1,
                "order": order,
                "rival_bank": rival,
            }
        )
    return rows


TINY_CONTESTS = [  # (first mover's actions, second mover's actions)
    ("dds", "db"),  # first banks 2; second busts on its second draw
    ("b", "s"),  # first busts (bank 0); second stops at 0: a tie at 0
    ("ddds", "ddds"),  # both reach the cap 3: a tie at 3
    ("s", "ds"),  # first stops at 0; second goes ahead with 1
]


def tiny_frame() -> pd.DataFrame:
    rows = []
    for t, (first, second) in enumerate(TINY_CONTESTS, start=1):
        banked = first.count("d") if not first.endswith("b") else None
        rows += decision_rows("a", "g", t, 1, None, first)
        rows += decision_rows("b", "g", t, 2, banked, second)
    return pd.DataFrame(rows)


def enumerated_loglik(second_random: bool = False) -> float:
    first = first_mover_stop(second_random)
    total = 0.0
    for first_actions, second_actions in TINY_CONTESTS:
        first_bank = 0.0 if first_actions.endswith("b") else float(first_actions.count("d"))
        second = second_mover_stop(first_bank)
        for stop, actions in ((first, first_actions), (second, second_actions)):
            for step, a in enumerate(actions):
                total += math.log(stop[step] if a == "s" else 1.0 - stop[step])
    return total


def test_likelihood_matches_enumeration_of_every_path():
    data = stopwise.load(tiny_frame()).arrays()
    model = resolve_model("crra+qre", CAP)
    model.options["prepare"](data)
    ll = np.asarray(jax.jit(model.loglik_obs)({"r": R, "precision": LAMBDA}, data))
    assert ll.shape == (data.n_obs,)
    assert float(ll.sum()) == pytest.approx(enumerated_loglik(), rel=1e-12, abs=1e-12)


def test_level_one_first_mover_matches_enumeration_against_a_random_second_mover():
    # level-k (option level=1): the first mover best-responds (logit) to a level-0 second
    # mover who stops at random; second movers of level >= 1 answer the state by logit
    data = stopwise.load(tiny_frame()).arrays()
    theta = {"r": R, "precision": LAMBDA}
    one = build_model("crra+levelk", max_target=CAP, level=1)
    one.options["prepare"](data)
    ll_one = float(np.asarray(jax.jit(one.loglik_obs)(theta, data)).sum())
    assert ll_one == pytest.approx(enumerated_loglik(second_random=True), rel=1e-12)
    # where the belief matters: level 1 differs from agent logit play, level 2 reduces to it
    assert abs(ll_one - enumerated_loglik()) > 1e-3
    two = build_model("crra+levelk", max_target=CAP, level=2)
    two.options["prepare"](data)
    ll_two = float(np.asarray(jax.jit(two.loglik_obs)(theta, data)).sum())
    assert ll_two == pytest.approx(enumerated_loglik(), rel=1e-12)


@pytest.mark.parametrize(
    "spec, extra", [("crra+levelk", {"level": 1.7}), ("crra+ch", {"tau": 1.4})]
)
def test_population_beliefs_agree_with_the_numpy_solver_and_differentiate(spec, extra):
    frame = simulate_sequential(
        0.75, 3, 4.0, groups=4, trials=3, keep_bank=True, precision=1.5, max_target=6, r=0.2
    )
    data = stopwise.load(frame).arrays()
    model = resolve_model(spec, 6)
    model.options["prepare"](data)
    theta = {"r": 0.2, "precision": 1.5, **extra}
    assert 0.0 <= model.options["sequential_check"](theta, data) <= 1e-10
    name = next(iter(extra))

    def total(value):
        return model.loglik_obs({**theta, name: value}, data).sum()

    total = jax.jit(total)

    h = 1e-6
    numeric = (total(extra[name] + h) - total(extra[name] - h)) / (2 * h)
    exact = float(jax.jit(jax.grad(total))(extra[name]))
    assert exact == pytest.approx(float(numeric), rel=1e-5)


def test_states_read_from_the_earlier_movers_rows_count_ties():
    # three movers; the first two both bust (bank 0, bust_keep 0): the third saw 0 held by 2
    rows = decision_rows("a", "g", 1, 1, None, "b") + decision_rows("b", "g", 1, 2, None, "db")
    rows += decision_rows("c", "g", 1, 3, None, "s")
    frame = pd.DataFrame(rows).assign(n_players=3)
    data = stopwise.load(frame).arrays()
    third = np.asarray(data.cond)[np.asarray(data.subject) == 2][0]
    assert np.asarray(data.cond_order)[third] == 3
    assert np.asarray(data.cond_seen_best)[third] == 0.0
    assert np.asarray(data.cond_seen_tied)[third] == 2  # both earlier movers at bank 0


def test_three_movers_agree_with_the_numpy_solver_including_ties():
    frame = simulate_sequential(
        0.75, 3, 4.0, groups=6, trials=4, keep_bank=True, precision=1.5, max_target=8, r=0.2
    )
    data = stopwise.load(frame).arrays()
    assert (np.asarray(data.cond_seen_tied) >= 2).any()  # some later mover saw a tie
    model = resolve_model("crra+qre", 8)
    model.options["prepare"](data)
    check = model.options["sequential_check"]({"r": 0.2, "precision": 1.5}, data)
    assert 0.0 <= check <= 1e-10


def test_exact_derivatives_match_central_differences():
    data = stopwise.load(tiny_frame()).arrays()
    model = resolve_model("crra+qre", CAP)
    model.options["prepare"](data)

    def total(r, lam):
        return model.loglik_obs({"r": r, "precision": lam}, data).sum()

    total = jax.jit(total)

    grad = jax.jit(jax.grad(total, argnums=(0, 1)))(R, LAMBDA)
    h = 1e-6
    numeric = (
        (total(R + h, LAMBDA) - total(R - h, LAMBDA)) / (2 * h),
        (total(R, LAMBDA + h) - total(R, LAMBDA - h)) / (2 * h),
    )
    assert np.allclose(np.asarray(grad), np.asarray(numeric), rtol=1e-6, atol=1e-8)


def test_concepts_without_a_sequential_likelihood_are_refused():
    data = stopwise.load(tiny_frame()).arrays()
    for spec in ("crra+nash", "crra+qre+tremble"):
        model = resolve_model(spec, CAP)
        with pytest.raises(StopwiseInputError, match="sequential contests"):
            model.options["prepare"](data)


def test_a_later_mover_whose_view_is_unknown_is_refused():
    # the third mover's earlier movers are missing (validation refuses such a file; a bundle
    # built directly is the way in): how many tie at the best is unknown
    frame = pd.DataFrame(decision_rows("c", "g", 1, 3, 1.0, "s")).assign(n_players=3)
    data = to_stopping_data(frame)
    assert np.asarray(data.cond_seen_tied)[0] == -1
    model = resolve_model("linear+qre", CAP)
    with pytest.raises(StopwiseInputError, match="lack what the mover saw"):
        model.options["prepare"](data)


def test_certificate_marks_a_disagreeing_fit_not_converged():
    # the check's logic on a result whose likelihood disagreed with the solver by 1e-3
    class Result:
        converged, warnings, extras = True, [], {}

    model = build_model("linear+qre", max_target=CAP)
    disagreeing = replace(model, options={**model.options, "sequential_check": lambda t, d: 1e-3})
    result = Result()
    certify_sequential(disagreeing, None, result, {"precision": 1.0})
    assert not result.converged and result.extras["sequential_check"] == 1e-3
    assert "disagrees with the independent backward-induction solver" in result.warnings[0]


@pytest.mark.slow
def test_fit_reports_its_certificate():
    fit = stopwise.fit("linear+qre", tiny_frame(), max_target=CAP, se="hessian")
    assert fit.converged
    assert 0.0 <= fit.extras["sequential_check"] <= 1e-8
    assert fit.to_dict()["sequential_check"] == fit.extras["sequential_check"]
    assert "checked by an independent solver" in fit.summary()


@pytest.mark.slow
def test_recovery_of_risk_attitude_and_precision_from_simulated_sequential_contests():
    truth = {"r": 0.3, "precision": 2.0}
    frame = simulate_sequential(
        0.8, 2, 10.0, groups=60, trials=10, keep_bank=True, precision=2.0, r=0.3,
        max_target=20, seed=7,
    )  # fmt: skip
    fit = stopwise.fit("crra+qre", frame, max_target=20)
    assert fit.converged
    estimates = fit.estimates()
    table = {row["name"]: row for row in fit.to_dict()["params"]}
    for name, value in truth.items():
        se = table[name]["se"]
        assert np.isfinite(se) and se > 0
        assert abs(estimates[name] - value) <= 3.0 * se, (name, estimates[name], se)
