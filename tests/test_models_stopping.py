"""Stopping policies: theory checks, the planner cap, censoring, gradients and edge numerics."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
from scipy import stats

import stopwise
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.models.noise import NOISE
from stopwise.models.spec import build_model
from stopwise.models.stopping import (
    Caps,
    Conditions,
    RiskParts,
    myopic_tables,
    planner_tables,
    policy_tables,
    target_log_probs,
    target_values,
)
from stopwise.models.utility import UTILITIES
from stopwise.models.weighting import (
    WEIGHTINGS,
    cumulative_prospect_value,
    rank_dependent_value,
    weight_functions,
)

COND = Conditions(
    p_survive=jnp.array([0.5, 0.8, 0.9]),
    gain=jnp.array([1.0, 1.0, 2.0]),
    start=jnp.array([0.0, 0.5, 1.0]),
    bust_keep=jnp.array([0.0, 0.0, 0.2]),
)


def parts(utility: str, noise: str = "logit", weighting: str | None = None, **kw) -> RiskParts:
    return RiskParts(
        UTILITIES[utility], WEIGHTINGS[weighting] if weighting else None, NOISE[noise], **kw
    )


def design(p_values=(0.6, 0.85), n_subjects=2, n_trials=16, **extra) -> pd.DataFrame:
    trial = np.tile(np.arange(n_trials), n_subjects)
    return pd.DataFrame(
        {
            "subject": np.repeat(np.arange(n_subjects), n_trials),
            "trial": trial,
            "p_survive": np.asarray(p_values)[trial % len(p_values)],
            "gain": 1.0,
            **extra,
        }
    )


def bank_grid(n: int) -> np.ndarray:
    steps = np.arange(n)
    return np.asarray(COND.start)[:, None] + steps[None, :] * np.asarray(COND.gain)[:, None]


# --------------------------------------------------------------------------- theory
def test_risk_neutral_policies_converge_to_the_optimal_rule():
    # Risk-neutral optimal stopping in this task is the one-step look-ahead rule (a monotone
    # problem: Chow, Robbins & Siegmund 1971, "Great Expectations", ch. 3): draw while
    # p (b + g) + (1 - p) k b > b, i.e. b < p g / ((1 - p)(1 - k)); with k = 0 this is the
    # familiar b < p g / (1 - p) (common practice, no source).
    p, g, k = (np.asarray(a)[:, None] for a in (COND.p_survive, COND.gain, COND.bust_keep))
    threshold = p * g / ((1 - p) * (1 - k))
    banks = bank_grid(30)
    rule = (banks < threshold).astype(float)
    rule[np.isclose(banks, threshold)] = 0.5  # exact indifference
    linear = parts("linear")
    for precision in (1e3, 1e4):
        theta = {"precision": precision}
        myopic = np.exp(myopic_tables(linear, theta, COND, 30)[0])
        planner = np.exp(planner_tables(linear, theta, COND, 30, 400)[0])
        np.testing.assert_allclose(myopic, rule, atol=1e-12)
        np.testing.assert_allclose(planner, rule, atol=1e-12)
    # With mild noise the two differ but both stay on the same side of 1/2 away from the rule's
    # switch point.
    low = {"precision": 1.0}
    myopic = np.exp(myopic_tables(linear, low, COND, 30)[0])
    planner = np.exp(planner_tables(linear, low, COND, 30, 400)[0])
    far = np.abs(banks - threshold) > 3 * np.asarray(COND.gain)[:, None]
    assert np.all((myopic[far] > 0.5) == (planner[far] > 0.5))


def test_crra_without_noise_myopic_equals_planner_and_the_one_step_rule():
    # For CRRA the task stays monotone, so the one-step rule is optimal (Chow, Robbins &
    # Siegmund 1971): deterministic myopic and planner policies coincide.
    banks = bank_grid(40)
    p, k = np.asarray(COND.p_survive)[:, None], np.asarray(COND.bust_keep)[:, None]
    g = np.asarray(COND.gain)[:, None]
    for r in (0.5, 0.9, -0.4):
        theta = {"r": r, "precision": 1e4}
        crra = parts("crra", wealth=1.0)
        myopic = np.exp(myopic_tables(crra, theta, COND, 40)[0])
        planner = np.exp(planner_tables(crra, theta, COND, 40, 600)[0])
        np.testing.assert_allclose(myopic, planner, atol=1e-9)

        def u(x, r=r):
            return (1 + x) ** (1 - r) / (1 - r)  # u over wealth 1 + amount, textbook form

        draw = p * u(banks + g) + (1 - p) * u(k * banks) > u(banks)
        np.testing.assert_allclose(myopic, draw.astype(float), atol=1e-9)


def test_noise_separates_planner_from_myopic():
    # With noise the planner values the chance to draw again (far below the threshold it draws
    # more than the myopic rule) and anticipates its own future mistakes (where the next state
    # is already past the threshold it draws slightly less).
    linear = parts("linear")
    theta = {"precision": 1.0}
    myopic = np.exp(myopic_tables(linear, theta, COND, 10)[0])
    planner = np.exp(planner_tables(linear, theta, COND, 10, 400)[0])
    assert planner[2, 0] - myopic[2, 0] > 0.1  # p = .9, threshold 22.5, bank 1
    assert planner[0, 0] < myopic[0, 0] - 1e-3  # p = .5, threshold 1, bank 0


def test_planner_cap_doubling_changes_nothing():
    cond = Conditions(
        jnp.array([0.3, 0.7, 0.95, 0.99]),
        jnp.array([1.0, 0.5, 1.0, 1.0]),
        jnp.array([0.0, 2.0, 0.0, 5.0]),
        jnp.array([0.0, 0.5, 0.0, 0.1]),
    )
    cases = [
        (parts("linear"), {"precision": 1.0}),
        (parts("crra"), {"r": -0.5, "precision": 0.5}),
        (parts("crra", "probit+tremble"), {"r": 0.6, "sigma": 0.3, "tremble": 0.1}),
        (
            parts("pt", weighting="tk"),
            {
                "alpha": 0.9,
                "beta": 0.9,
                "loss_aversion": 2.0,
                "gamma": 0.7,
                "delta": 0.7,
                "precision": 2.0,
            },
        ),
    ]
    n_steps = 60
    default_cap = Caps().planner_cap(n_steps)
    assert default_cap == n_steps + 3437  # ceil(log(1e-15) / log(0.99)) extra steps
    for risk, theta in cases:
        base = np.exp(planner_tables(risk, theta, cond, n_steps, default_cap)[0])
        doubled = np.exp(planner_tables(risk, theta, cond, n_steps, 2 * default_cap)[0])
        assert np.max(np.abs(base - doubled)) < 1e-9


# --------------------------------------------------------------------------- target policy
def test_target_values_match_the_general_lottery_functionals():
    n = 12
    cases = [
        (parts("linear"), {}),
        (parts("crra", weighting="prelec2"), {"r": 0.4, "gamma": 0.6, "delta": 0.8}),
        (
            parts("pt", weighting="tk"),
            {"alpha": 0.88, "beta": 0.88, "loss_aversion": 2.25, "gamma": 0.61, "delta": 0.69},
        ),
    ]
    p, g, s0, k = (
        np.asarray(a)[:, None, None]
        for a in (COND.p_survive, COND.gain, COND.start, COND.bust_keep)
    )
    t = np.arange(n)[None, :, None]  # target
    j = np.arange(n + 1)[None, None, :]  # outcome slot: 0 = reach the target, 1 + i = bust after i
    bust_after = j - 1
    is_bust = (j >= 1) & (bust_after < t)
    amounts = np.where(j == 0, s0 + t * g, k * (s0 + np.maximum(bust_after, 0) * g))
    probs = np.where(j == 0, p**t, np.where(is_bust, p ** np.maximum(bust_after, 0) * (1 - p), 0.0))
    amounts = np.where((j == 0) | is_bust, amounts, amounts[..., :1])  # padding repeats outcome 0
    for risk, theta in cases:
        closed = np.asarray(target_values(risk, theta, COND, n))
        w_gain, w_loss = weight_functions(risk.weighting, theta)
        if risk.sign_dependent:
            v = UTILITIES["pt"].fn(amounts, theta, s0)
            general = cumulative_prospect_value(v, probs, w_gain, w_loss)
        else:
            general = rank_dependent_value(risk.utility.fn(amounts, theta), probs, w_gain)
        np.testing.assert_allclose(closed, general, rtol=1e-9, atol=1e-12)


def test_target_rows_factorise_and_busts_censor():
    model = build_model("crra+target+logit")
    theta = {"r": 0.3, "precision": 2.0}
    frame = pd.DataFrame(
        {
            "subject": 1,
            "trial": [1, 1, 1, 1, 2, 2, 2],
            "step": [0, 1, 2, 3, 0, 1, 2],
            "p_survive": 0.8,
            "gain": 1.0,
            "action": ["draw", "draw", "draw", "draw", "draw", "draw", "stop"],
            "outcome": ["success", "success", "success", "bust", "success", "success", np.nan],
        }
    )
    data = to_stopping_data(frame)
    rows = np.asarray(model.loglik_obs(theta, data))
    caps = Caps()
    log_target = np.asarray(
        target_log_probs(model_parts(model), theta, Conditions.from_data(data), data.horizon, caps)
    )[0]
    # busted after 3 successes: the likelihood says only T > 3
    assert rows[:4].sum() == pytest.approx(np.logaddexp.reduce(log_target[4:]), abs=1e-10)
    # stopped at step 2: T = 2 exactly
    assert rows[4:].sum() == pytest.approx(log_target[2], abs=1e-10)
    assert np.exp(log_target).sum() == pytest.approx(1.0, abs=1e-12)


def model_parts(model) -> RiskParts:
    """The RiskParts behind a spec-built model (rebuilt from its name and options)."""
    utility, *rest = model.name.split("+")
    noise = "+".join(p for p in rest if p in ("logit", "probit", "tremble"))
    weighting = next((p for p in rest if p in WEIGHTINGS), None)
    return parts(utility, noise, weighting)


def test_target_set_follows_the_tolerance_and_the_observed_horizon():
    risk = parts("linear")
    theta = {"precision": 1.0}
    caps = Caps(target_tolerance=1e-4)
    cond = Conditions(jnp.array([0.5, 0.9]), jnp.array([1.0, 1.0]), jnp.zeros(2), jnp.zeros(2))
    probs = np.exp(np.asarray(target_log_probs(risk, theta, cond, 5, caps)))
    # 0.5^14 < 1e-4 <= 0.5^13 and 0.9^88 < 1e-4 <= 0.9^87: targets 0..14 and 0..88
    assert probs[0, 14] > 1e-8 and probs[0, 15] == 0.0
    assert probs[1, 88] > 1e-8 and probs[1, 89] == 0.0
    longer = np.exp(np.asarray(target_log_probs(risk, theta, cond, 20, caps)))
    assert longer[0, 20] > 0 and longer[0, 21] == 0.0  # extended to the observed horizon


# --------------------------------------------------------------------------- gradients
GRADIENT_SPECS = [
    "linear+myopic+logit",
    "crra+planner+logit",
    "crra+target+probit",
    "cara+planner+probit+tremble",
    "expo+myopic+tremble",
    "pt+tk+target+logit",
    "pt+prelec+planner+logit",
    "crra+ge+myopic+probit",
    "crra+prelec2+target+logit+tremble",
]


def _interior_theta(model) -> dict[str, float]:
    theta = model.start_theta()
    nudged = {"r": 0.45, "a": 0.12, "precision": 1.6, "sigma": 0.8, "gamma": 0.75}
    return {k: nudged.get(k, v) for k, v in theta.items()}


@pytest.fixture(scope="module")
def stopping_data():
    sim = stopwise.simulate(
        "linear+myopic+logit", {"precision": 1.0}, design(start=1.0, bust_keep=0.25), seed=3
    )
    return to_stopping_data(sim)


@pytest.mark.parametrize("spec", GRADIENT_SPECS)
def test_gradients_match_central_differences(spec, stopping_data):
    model = build_model(spec, max_p_survive=0.9)
    total = jax.jit(lambda t: jnp.sum(model.loglik_obs(t, stopping_data)))
    theta = _interior_theta(model)
    grad = jax.jit(jax.grad(lambda t: jnp.sum(model.loglik_obs(t, stopping_data))))(theta)
    for name, value in theta.items():
        h = 1e-5 * max(1.0, abs(value))
        up, down = dict(theta), dict(theta)
        up[name], down[name] = value + h, value - h
        central = (float(total(up)) - float(total(down))) / (2 * h)  # common practice, no source
        assert float(grad[name]) == pytest.approx(central, rel=1e-5, abs=1e-6), (spec, name)


# --------------------------------------------------------------------------- edges
def edge_frame() -> pd.DataFrame:
    """Short trials at survival chances near 0 and 1 (a draw, a bust, a stop each)."""
    rows = []
    for trial, p in enumerate((1e-6, 0.3, 0.999999)):
        rows += [
            (2 * trial, 0, p, "draw", "bust"),
            (2 * trial + 1, 0, p, "draw", "success"),
            (2 * trial + 1, 1, p, "draw", "success"),
            (2 * trial + 1, 2, p, "stop", np.nan),
        ]
    frame = pd.DataFrame(rows, columns=["trial", "step", "p_survive", "action", "outcome"])
    return frame.assign(subject=1, gain=1.0)


@pytest.mark.filterwarnings("ignore:the data have p_survive")
@pytest.mark.parametrize("policy", ["myopic", "planner", "target"])
def test_edge_numerics_stay_finite(policy):
    data = to_stopping_data(edge_frame())
    model = build_model(f"crra+{policy}+logit")
    objective = jax.jit(jax.value_and_grad(lambda t: jnp.sum(model.loglik_obs(t, data))))
    for r in (1 - 1e-9, 1.0, 1 + 1e-9, 2.0, 4.9, -2.9):
        for precision in (1e-3, 1.0, 1e4):
            value, grads = objective({"r": r, "precision": precision})
            assert not np.isnan(float(value)), (r, precision)
            assert all(np.isfinite(float(g)) for g in grads.values()), (r, precision)
    # Zero bank with r >= 1: u(0) is the floor, so the first draw is always taken and the
    # probabilities are exact 0/1 rather than NaN.
    cond = Conditions(jnp.array([0.5]), jnp.array([1.0]), jnp.array([0.0]), jnp.array([0.0]))
    risk = parts("crra")
    log_draw, log_stop = policy_tables(policy, risk, {"r": 2.0, "precision": 1.0}, cond, 4, Caps())
    assert np.all(np.isfinite(np.asarray(log_stop)) | (np.asarray(log_stop) == -np.inf))
    assert not np.any(np.isnan(np.asarray(log_draw)))
    assert float(np.exp(log_draw[0, 0])) == pytest.approx(1.0)


def test_predict_agrees_with_the_likelihood(stopping_data):
    for spec in ("crra+planner+logit+tremble",):
        model = build_model(spec, max_p_survive=0.9)
        theta = _interior_theta(model)
        prob = np.asarray(model.predict(theta, stopping_data))
        rows = np.exp(np.asarray(model.loglik_obs(theta, stopping_data)))
        draw = np.asarray(stopping_data.draw) > 0.5
        np.testing.assert_allclose(rows[draw], prob[draw], rtol=1e-12)
        np.testing.assert_allclose(rows[~draw], 1 - prob[~draw], rtol=1e-9)


def test_survival_chances_beyond_the_caps_are_reported():
    data = to_stopping_data(edge_frame())
    with pytest.warns(UserWarning, match="above max_p_survive=0.999"):
        build_model("crra+planner+logit").loglik_obs({"r": 0.3, "precision": 1.0}, data)
    with pytest.raises(stopwise.data_schemas.errors.StopwiseInputError, match="max_p_survive"):
        build_model("crra+planner+logit", max_p_survive=0.9999)


def test_likelihood_vmaps_over_subject_cells(stopping_data):
    # The engines vmap loglik_obs over padded per-subject blocks (estimation.cells); each
    # block must give the rows' log-likelihoods at that block's own parameters.
    from stopwise.estimation.cells import loglik_cells, split_into_cells

    model = build_model("crra+target+logit", max_p_survive=0.9)
    cells = split_into_cells(stopping_data, np.asarray(stopping_data.subject))
    theta_cells = {"r": jnp.array([0.2, 0.7]), "precision": jnp.array([1.5, 3.0])}
    # both sides compiled (as the engines call them): evaluated op by op, each of the
    # model's primitives would be compiled on its own
    per_cell_loglik = jax.jit(lambda thetas: loglik_cells(model.loglik_obs, thetas, cells))
    per_cell = np.asarray(per_cell_loglik(theta_cells))
    direct_loglik = jax.jit(model.loglik_obs)
    for c in range(cells.n_cells):
        rows = cells.rows[c][cells.rows[c] >= 0]
        theta = {k: jnp.asarray(v[c]) for k, v in theta_cells.items()}
        direct = np.asarray(direct_loglik(theta, stopping_data))[rows]
        np.testing.assert_allclose(per_cell[c][: len(rows)], direct, rtol=1e-12)


def test_contextual_myopic_and_prospect_reference_by_hand():
    # Wilcox (2011) contextual utility: the value difference of the one-step gamble is divided
    # by u(best outcome) - u(worst outcome) of that gamble, u(b + g) - u(k b).
    banks = bank_grid(6)
    p, g, k = (np.asarray(a)[:, None] for a in (COND.p_survive, COND.gain, COND.bust_keep))
    theta = {"r": 0.5, "sigma": 0.3}
    risk = parts("crra", "probit", wealth=1.0, contextual=True)
    ours = np.exp(np.asarray(myopic_tables(risk, theta, COND, 6)[0]))

    def u(x):
        return (1 + x) ** 0.5 / 0.5

    diff = p * u(banks + g) + (1 - p) * u(k * banks) - u(banks)
    expected = stats.norm.cdf(diff / (u(banks + g) - u(k * banks)) / 0.3)
    np.testing.assert_allclose(ours, expected, rtol=1e-10)
    # Prospect values around the start of the trial (default) or a fixed reference point.
    pt_theta = {"alpha": 0.8, "beta": 0.8, "loss_aversion": 2.0, "precision": 1.0}
    at_start = np.asarray(myopic_tables(parts("pt"), pt_theta, COND, 6)[0])
    at_zero = np.asarray(myopic_tables(parts("pt", reference=0.0), pt_theta, COND, 6)[0])
    np.testing.assert_allclose(at_start[0], at_zero[0], rtol=1e-12)  # start 0: same point
    assert not np.allclose(at_start[1:], at_zero[1:])  # start > 0: busts become losses
    b, s0 = banks[1, 0], float(COND.start[1])
    v_gain = (b + 1 - s0) ** 0.8  # v(x - ref) with ref = start
    v_bust = -2.0 * (s0 - 0.0) ** 0.8
    v_now = (b - s0) ** 0.8 if b > s0 else 0.0
    diff = 0.8 * v_gain + 0.2 * v_bust - v_now
    assert np.exp(at_start[1, 0]) == pytest.approx(1 / (1 + np.exp(-diff)), rel=1e-12)


def test_caps_sized_from_concrete_data_agree_with_the_traced_fallback(stopping_data):
    # Concrete data size the static caps from their largest p_survive (0.85 here); traced data
    # fall back to 0.99. The target set is the same (the per-condition mask decides it) and the
    # planner tables agree within the 1e-9 of the cap test.
    for spec, tolerance in (("crra+target+logit", 1e-12), ("crra+planner+probit", 1e-9)):
        model = build_model(spec)
        theta = _interior_theta(model)
        concrete = np.exp(np.asarray(model.loglik_obs(theta, stopping_data)))
        traced = np.exp(np.asarray(jax.jit(model.loglik_obs)(theta, stopping_data)))
        np.testing.assert_allclose(concrete, traced, rtol=0, atol=tolerance)
