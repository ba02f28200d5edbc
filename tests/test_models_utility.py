"""Utility families and probability weighting, checked against published values."""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.optimize import brentq

import stopwise  # noqa: F401  (enables float64 in JAX)
from stopwise.data_schemas.arrays import LotteryData
from stopwise.models.lottery import value_difference
from stopwise.models.noise import NOISE
from stopwise.models.spec import build_model
from stopwise.models.stopping import RiskParts
from stopwise.models.utility import UTILITIES, UTILITY_FLOOR
from stopwise.models.weighting import (
    WEIGHTINGS,
    cumulative_prospect_value,
    rank_dependent_value,
)

TK_MEDIANS = {"alpha": 0.88, "beta": 0.88, "loss_aversion": 2.25, "gamma": 0.61, "delta": 0.69}
# Tversky & Kahneman (1992), JRU 5:297-323, median estimates (section 2.3 and eq. for w).


def lotteries(rows: list[tuple[list[float], list[float], list[float], list[float]]]) -> LotteryData:
    """LotteryData from (a_x, a_p, b_x, b_p) per row, padded with p = 0 (first outcome)."""
    width = max(max(len(r[0]), len(r[2])) for r in rows)

    def pad(xs: list[float], ps: list[float]) -> tuple[list[float], list[float]]:
        return xs + [xs[0]] * (width - len(xs)), ps + [0.0] * (width - len(ps))

    a = [pad(r[0], r[1]) for r in rows]
    b = [pad(r[2], r[3]) for r in rows]
    n = len(rows)
    return LotteryData(
        subject=np.zeros(n, np.int32),
        choice_b=np.zeros(n),
        a_x=np.array([x for x, _ in a]),
        a_p=np.array([p for _, p in a]),
        b_x=np.array([x for x, _ in b]),
        b_p=np.array([p for _, p in b]),
    )


# --------------------------------------------------------------------------- Holt & Laury
def test_holt_laury_crra_boundaries():
    # Holt & Laury (2002), AER 92(5):1644-1655, Table 3: CRRA ranges by number of safe
    # choices; payoffs A = 2.00/1.60, B = 3.85/0.10, high payoff with chance k/10. The
    # boundary between k-1 and k safe choices is the r that makes row k indifferent.
    printed = [-0.95, -0.49, -0.15, 0.15, 0.41, 0.68, 0.97, 1.37]
    rows = [
        ([2.0, 1.6], [k / 10, 1 - k / 10], [3.85, 0.1], [k / 10, 1 - k / 10]) for k in range(2, 10)
    ]
    data = lotteries(rows)
    model = build_model("crra+logit")
    predict = jax.jit(model.predict)
    for k, boundary in enumerate(printed):

        def gap(r: float, k: int = k) -> float:
            return float(predict({"r": r, "precision": 1.0}, data)[k]) - 0.5

        root = brentq(gap, -2.5, 2.9, xtol=1e-10)
        assert abs(root - boundary) < 0.01, (k + 2, root, boundary)


# --------------------------------------------------------------------------- utilities
def test_crra_matches_textbook_form_and_log_limit():
    x = jnp.array([0.1, 0.5, 1.0, 2.0, 7.5])
    for r in (-1.5, 0.0, 0.3, 0.9, 1.5, 3.0):
        u = UTILITIES["crra"].fn(x, {"r": r})
        textbook = np.asarray(x) ** (1 - r) / (1 - r) - 1 / (1 - r)  # common practice, no source
        np.testing.assert_allclose(u, textbook, rtol=1e-12, atol=1e-12)
    for r in (1.0, 1 - 1e-7, 1 + 1e-7, 1 - 3e-4, 1 + 3e-4):
        u = UTILITIES["crra"].fn(x, {"r": r})
        c = 1 - r
        exact = np.log(np.asarray(x)) if c == 0 else np.expm1(c * np.log(np.asarray(x))) / c
        np.testing.assert_allclose(u, exact, rtol=1e-10, atol=1e-12)
    grad = jax.grad(lambda r: jnp.sum(UTILITIES["crra"].fn(x, {"r": r})))
    for r in (1.0 - 1e-9, 1.0, 1.0 + 1e-9):
        # d/dr of (x^(1-r) - 1)/(1-r) at r = 1 is -(log x)^2 / 2 (series of the power index)
        np.testing.assert_allclose(grad(r), -np.sum(np.log(np.asarray(x)) ** 2) / 2, rtol=1e-6)


def test_crra_zero_and_negative_outcomes():
    fn = UTILITIES["crra"].fn
    assert float(fn(0.0, {"r": 0.5})) == pytest.approx(-2.0)
    for r in (1.0, 2.0, 4.9):
        assert float(fn(0.0, {"r": r})) == UTILITY_FLOOR
        g = jax.grad(lambda r: fn(jnp.array([0.0, 1e-300, 1.0]), {"r": r}).sum())(r)
        assert np.isfinite(g)
    assert float(fn(-1.0, {"r": 0.5})) == UTILITY_FLOOR


def test_cara_linear_limit_and_form():
    x = jnp.linspace(0.0, 20.0, 11)
    for a in (0.0, 1e-9, -1e-9, 5e-5):
        np.testing.assert_allclose(UTILITIES["cara"].fn(x, {"a": a}), x, rtol=1e-3, atol=1e-12)
    for a in (-0.5, 0.2, 2.0):
        expected = (1 - np.exp(-a * np.asarray(x))) / a  # common practice, no source
        np.testing.assert_allclose(UTILITIES["cara"].fn(x, {"a": a}), expected, rtol=1e-12)
    g = jax.grad(lambda a: UTILITIES["cara"].fn(x, {"a": a}).sum())(0.0)
    np.testing.assert_allclose(g, -np.sum(np.asarray(x) ** 2) / 2, rtol=1e-12)


def test_expo_power_special_cases():
    # Saha (1993) expo-power u = (1 - exp(-a x^(1-r)))/a in the notation of Holt & Laury
    # (2002, section IV): r = 0 gives CARA, a -> 0 gives the power function x^(1-r).
    x = jnp.array([0.0, 0.3, 1.0, 4.0, 9.0])
    fn = UTILITIES["expo"].fn
    np.testing.assert_allclose(fn(x, {"r": 0.0, "a": 0.7}), UTILITIES["cara"].fn(x, {"a": 0.7}))
    np.testing.assert_allclose(
        fn(x, {"r": 0.269, "a": 1e-8}), np.asarray(x) ** 0.731, rtol=1e-6, atol=1e-12
    )
    expected = (1 - np.exp(-0.029 * np.asarray(x) ** 0.731)) / 0.029  # HL (2002) estimates
    np.testing.assert_allclose(fn(x, {"r": 0.269, "a": 0.029}), expected, rtol=1e-12)


def test_prospect_value_tk_medians():
    # Tversky & Kahneman (1992): v(x) = x^0.88 for gains, -2.25 (-x)^0.88 for losses.
    v = UTILITIES["pt"].fn(jnp.array([100.0, -100.0, 0.0, 150.0]), TK_MEDIANS, 50.0)
    np.testing.assert_allclose(
        v, [50**0.88, -2.25 * 150**0.88, -2.25 * 50**0.88, 100**0.88], rtol=1e-12
    )
    g = jax.grad(lambda t: UTILITIES["pt"].fn(jnp.array([0.0, 1.0, -1.0]), t).sum())(
        dict(TK_MEDIANS)
    )
    assert all(np.isfinite(float(val)) for val in g.values())


# --------------------------------------------------------------------------- weighting
def test_prelec_fixed_point_at_one_over_e():
    # Prelec (1998), Econometrica 66(3): w(p) = exp(-(-ln p)^alpha) has w(1/e) = 1/e for every
    # alpha (the "compound invariance" fixed point).
    for gamma in (0.2, 0.5, 0.65, 1.0, 1.7):
        w = WEIGHTINGS["prelec"].fn(jnp.array(1 / math.e), {"gamma": gamma})
        assert float(w) == pytest.approx(1 / math.e, abs=1e-14)
        w2 = WEIGHTINGS["prelec2"].fn(jnp.array(1 / math.e), {"gamma": gamma, "delta": 1.0})
        assert float(w2) == pytest.approx(1 / math.e, abs=1e-14)


def test_tk_weighting_values_at_medians():
    # Tversky & Kahneman (1992), eq. w(p) = p^c / (p^c + (1-p)^c)^(1/c), c = 0.61 (gains),
    # 0.69 (losses).
    p = np.array([0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99])
    for c, losses in ((0.61, False), (0.69, True)):
        formula = p**c / (p**c + (1 - p) ** c) ** (1 / c)
        np.testing.assert_allclose(WEIGHTINGS["tk"].fn(p, TK_MEDIANS, losses), formula, rtol=1e-12)
    w = np.asarray(WEIGHTINGS["tk"].fn(p, TK_MEDIANS))
    # Inverse-S shape: small probabilities overweighted, moderate and large underweighted
    # (Tversky & Kahneman 1992, Fig. 1), with w+(.5) about .42 (from memory).
    assert np.all(w[:3] > p[:3]) and np.all(w[4:] < p[4:])
    assert w[4] == pytest.approx(0.421, abs=0.002)
    fixed_point = brentq(lambda q: float(WEIGHTINGS["tk"].fn(q, TK_MEDIANS)) - q, 0.05, 0.9)
    assert 0.30 < fixed_point < 0.40  # crossover near 1/3 (from memory)


def test_weightings_end_points_and_gradients():
    theta = {"gamma": 0.6, "delta": 0.8}
    for fam in WEIGHTINGS.values():
        w = fam.fn(jnp.array([0.0, 1.0]), theta)
        np.testing.assert_array_equal(w, [0.0, 1.0])
        g = jax.grad(lambda t, fam=fam: fam.fn(jnp.array([0.0, 0.3, 1.0]), t).sum())(theta)
        assert all(np.isfinite(float(v)) for v in g.values())
    ge = WEIGHTINGS["ge"].fn(jnp.array(0.3), theta)
    expected = 0.8 * 0.3**0.6 / (0.8 * 0.3**0.6 + 0.7**0.6)  # Gonzalez & Wu (1999), eq. (3)
    assert float(ge) == pytest.approx(expected, rel=1e-12)


def test_rank_dependent_padding_and_identity():
    values = jnp.array([[3.0, 1.0, 2.0, 3.0]])
    probs = jnp.array([[0.2, 0.5, 0.3, 0.0]])  # last outcome is padding
    identity = rank_dependent_value(values, probs, lambda q: q)
    assert float(identity[0]) == pytest.approx(0.2 * 3 + 0.5 * 1 + 0.3 * 2)
    w = lambda q: WEIGHTINGS["tk"].fn(q, TK_MEDIANS)  # noqa: E731
    unpadded = rank_dependent_value(values[:, :3], probs[:, :3], w)
    np.testing.assert_allclose(rank_dependent_value(values, probs, w), unpadded, rtol=1e-14)
    # Quiggin (1982) RDU by hand: ranked 3 (0.2), 2 (0.3), 1 (0.5).
    by_hand = w(0.2) * 3 + (w(0.5) - w(0.2)) * 2 + (1 - w(0.5)) * 1
    assert float(unpadded[0]) == pytest.approx(float(by_hand), rel=1e-12)


def _cpt_by_hand(xs: list[float], ps: list[float]) -> float:
    """CPT value of a lottery written out from Tversky & Kahneman (1992), section 1.2."""
    a, lam = TK_MEDIANS["alpha"], TK_MEDIANS["loss_aversion"]

    def w(q: float, c: float) -> float:
        return q**c / (q**c + (1 - q) ** c) ** (1 / c) if 0 < q < 1 else float(q >= 1)

    total = 0.0
    for x, p in zip(xs, ps):
        if x > 0:
            better = sum(pp for xx, pp in zip(xs, ps) if xx > x)
            total += (w(better + p, 0.61) - w(better, 0.61)) * x**a
        elif x < 0:
            worse = sum(pp for xx, pp in zip(xs, ps) if xx < x)
            total += (w(worse + p, 0.69) - w(worse, 0.69)) * (-lam * (-x) ** a)
    return total


# Kahneman & Tversky (1979), Econometrica 47(2), problems and modal choices (from memory):
# problem 1: 82% chose B; 2: 83% chose C; 3: 80% chose the sure 3000; 4: 65% chose
# (4000, .20); 3': 92% chose the gamble (-4000, .80).
KT_PROBLEMS = [
    ("1", ([2500, 2400, 0], [0.33, 0.66, 0.01]), ([2400], [1.0]), "B"),
    ("2", ([2500, 0], [0.33, 0.67]), ([2400, 0], [0.34, 0.66]), "A"),
    ("3", ([4000, 0], [0.8, 0.2]), ([3000], [1.0]), "B"),
    ("4", ([4000, 0], [0.2, 0.8]), ([3000, 0], [0.25, 0.75]), "A"),
    ("3'", ([-4000, 0], [0.8, 0.2]), ([-3000], [1.0]), "A"),
]


def test_kahneman_tversky_1979_problems_under_cpt_medians():
    rows = [
        (list(map(float, a[0])), a[1], list(map(float, b[0])), b[1]) for _, a, b, _ in KT_PROBLEMS
    ]
    data = lotteries(rows)
    parts = RiskParts(UTILITIES["pt"], WEIGHTINGS["tk"], NOISE["logit"], reference=0.0)
    diff = np.asarray(value_difference(parts, {**TK_MEDIANS, "precision": 1.0}, data))
    for i, (name, a, b, modal) in enumerate(KT_PROBLEMS):
        by_hand = _cpt_by_hand(*b) - _cpt_by_hand(*a)
        assert diff[i] == pytest.approx(by_hand, rel=1e-10), name
        assert (diff[i] > 0) == (modal == "B"), name


def test_cumulative_value_of_mixed_lottery():
    # A mixed 50-50 gamble (+100 / -100) is rejected under the TK (1992) medians (loss aversion).
    w_gain = lambda q: WEIGHTINGS["tk"].fn(q, TK_MEDIANS)  # noqa: E731
    w_loss = lambda q: WEIGHTINGS["tk"].fn(q, TK_MEDIANS, True)  # noqa: E731
    v = UTILITIES["pt"].fn(jnp.array([100.0, -100.0]), TK_MEDIANS)
    value = cumulative_prospect_value(v, jnp.array([0.5, 0.5]), w_gain, w_loss)
    assert float(value) == pytest.approx(_cpt_by_hand([100, -100], [0.5, 0.5]), rel=1e-12)
    assert float(value) < 0
