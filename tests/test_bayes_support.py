"""Pooled CRRA fits sample r on (lower, 1) only where the data make the likelihood zero at
r >= 1 (estimation/bayes/support.py, issue 16 item 2): the check, the cases where it must not
cut, and the claim that the posterior is unchanged, by quadrature."""

from __future__ import annotations

import math

import jax
import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

import stopwise
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.bayes.support import (
    prior_quantiles,
    sample_below_cliff,
    summed_loglik_at,
)
from stopwise.estimation.bayes.truncation import with_planner_cap
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model
from stopwise.models.utility import UTILITY_FLOOR, crra_utility

SPEC = "crra+myopic+logit"  # the cheapest CRRA stopping model; the planner shares the cliff


def simulated(spec: str, theta: dict[str, float], seed: int = 3) -> object:
    """Invented data: 6 subjects x 10 trials at p_survive 0.6 / 0.75, gain 1, bank 0."""
    design = stopping_design(6, 10, (0.6, 0.75), 1.0, seed=seed)
    model = build_model(spec)
    frame = model.simulate(theta, design, jax.random.PRNGKey(seed))
    return model, stopwise.load(frame).arrays()


def test_crra_utility_of_zero_is_minus_infinity_from_r_one_on():
    # u(x) = (x^(1-r) - 1) / (1 - r): u(0) = -1 / (1 - r) for r < 1, -infinity for r >= 1
    # (common practice, no source); the model's stand-in for -infinity is UTILITY_FLOOR
    for r in (1.0, 1.5, 4.9):
        assert float(crra_utility(0.0, {"r": r})) == UTILITY_FLOOR
    assert float(crra_utility(0.0, {"r": 0.5})) == pytest.approx(-2.0)


def test_prior_quantiles_match_scipy():
    model = build_model(SPEC)
    priors = resolve_priors(model)
    got = prior_quantiles(priors["precision"], model.spec("precision"))
    # default precision prior LogNormal(log 1, 1.5) (estimation/bayes/priors.py); reference:
    # scipy.stats.lognorm.ppf (package registry)
    want = [stats.lognorm.ppf(q, 1.5, scale=1.0) for q in (0.5,)]
    assert any(v == pytest.approx(want[0], rel=1e-12) for v in got)
    low = min(got)
    assert math.log(low) == pytest.approx(1.5 * stats.norm.ppf(1e-300), rel=1e-9)


def test_data_with_a_draw_at_a_positive_bank_rule_out_r_from_one_on():
    model, data = simulated(SPEC, {"r": 0.3, "precision": 2.0})
    assert np.any((np.asarray(data.step) > 0) & (np.asarray(data.draw) > 0))
    restricted, note = sample_below_cliff(
        model, data, hierarchical=False, formulas=None, priors=None
    )
    assert restricted.spec("r").upper == 1.0 and restricted.spec("r").lower == -3.0
    assert restricted.spec("precision") == model.spec("precision")
    assert note is not None and "r sampled on (-3, 1)" in note
    # the posterior is unchanged: by quadrature over the full box (r in (-3, 5), precision
    # over its prior's 1e-6..1 - 1e-6 range), the posterior mass at r >= 1 is nil
    r = np.linspace(-2.99, 4.99, 161)
    precision = np.exp(np.linspace(1.5 * stats.norm.ppf(1e-6), 1.5 * stats.norm.ppf(1 - 1e-6), 60))
    rr, pp = np.meshgrid(r, precision, indexing="ij")
    points = [{"r": a, "precision": b} for a, b in zip(rr.ravel(), pp.ravel())]
    log_post = (
        summed_loglik_at(model, data, points).reshape(rr.shape)
        + stats.norm.logpdf(rr)
        + stats.lognorm.logpdf(pp, 1.5)
        + np.log(pp)  # grid uniform in log precision
    )
    log_mass_beyond = logsumexp(log_post[r >= 1.0])
    assert log_mass_beyond - logsumexp(log_post) < -1e6


def test_data_that_allow_r_beyond_one_keep_the_bounds():
    # r = 3: draw at bank 0 (stopping is worth u(0) = -infinity), stop at every positive
    # bank (a bust would cost -infinity): the likelihood is ~1 at every r >= 1, so cutting
    # there would change the posterior (the case the check must refuse)
    model, data = simulated(SPEC, {"r": 3.0, "precision": 2.0})
    assert not np.any((np.asarray(data.step) > 0) & (np.asarray(data.draw) > 0))
    ll = summed_loglik_at(model, data, [{"r": 2.0, "precision": 2.0}])
    assert ll[0] > -1e-6
    restricted, note = sample_below_cliff(
        model, data, hierarchical=False, formulas=None, priors=None
    )
    assert restricted is model and note is None


def test_tremble_hierarchy_and_formulas_keep_the_bounds():
    model, data = simulated(SPEC, {"r": 0.3, "precision": 2.0})
    for hierarchical, formulas in ((True, None), (False, ["r ~ 1"])):
        same, note = sample_below_cliff(
            model, data, hierarchical=hierarchical, formulas=formulas, priors=None
        )
        assert same is model and note is None
    # with a tremble every choice keeps probability >= tremble / 2, so r >= 1 is possible
    trembling = build_model(SPEC + "+tremble")
    same, note = sample_below_cliff(trembling, data, hierarchical=False, formulas=None, priors=None)
    assert same is trembling and note is None


def test_planner_recaps_keep_the_narrowed_bounds():
    # the truncation check compares the sampled model with its default-cap twin at the same
    # draws (estimation/bayes/truncation.py): both must read z_r on the same bounds
    model = build_model("crra+planner+logit", max_target=30)
    _, data = simulated(SPEC, {"r": 0.3, "precision": 2.0})
    model.options["prepare"](data)
    narrowed, note = sample_below_cliff(model, data, hierarchical=False, formulas=None, priors=None)
    assert note is not None
    for cap in (None, 40):
        twin = with_planner_cap(narrowed, cap)
        assert twin.spec("r").upper == 1.0 and twin.options["max_target"] == cap
