"""The pooled start's check (estimation/bayes/mode_start.py): a Laplace start wider than ten
prior sds is refused and replaced by the exact posterior mode, checked against closed forms,
scipy's Nelder-Mead and central differences, on data where the refusal changes the start."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
from scipy import optimize

import stopwise
from stopwise.estimation.bayes import mode_start
from stopwise.estimation.bayes.density import pooled_log_prior, population_sites
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.bayes.laplace_mode import (
    flat_sizes,
    laplace_mode_from_precision,
    prior_terms,
)
from stopwise.estimation.bayes.mode_start import (
    EXACT_ORIGIN,
    LAPLACE_ORIGIN,
    PRIOR_ORIGIN,
    SPREAD_LIMIT,
    SPREAD_TRIGGER,
    PriorScale,
    checked_pooled_start,
    flatten_sites,
    posterior_mode,
    refused_coordinates,
    unflatten_sites,
)
from stopwise.estimation.bayes.pooled_start import laplace_start, ml_start
from stopwise.estimation.bayes.prepare import as_bundle, prepare
from stopwise.estimation.bayes.support import sample_below_cliff
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.models.spec import build_model

# Invented: one participant who stops at once twice, then draws once and stops. The ML
# point of crra+myopic+logit runs off along a direction these four decisions leave flat
# (found among 40 simulated tiny data sets; the Laplace start's sds were about 4e5).
TINY = pd.DataFrame(
    {
        "subject": ["s001"] * 4,
        "trial": [1, 2, 3, 3],
        "step": [0, 0, 0, 1],
        "p_survive": [0.8] * 4,
        "gain": [1.0] * 4,
        "action": ["stop", "stop", "draw", "stop"],
        "outcome": [None, None, "success", None],
        "bank": [0.0, 0.0, 0.0, 1.0],
    }
)
MODEL = "crra+myopic+logit"


def never_called() -> PriorScale:
    raise AssertionError("the prior's scale was computed for a narrow start")


def test_a_narrow_start_is_accepted_without_computing_the_prior_scale() -> None:
    assert refused_coordinates(np.array([0.3, SPREAD_TRIGGER * 0.99]), never_called) == []


def test_a_start_wider_than_the_limit_is_refused_coordinate_by_coordinate() -> None:
    prior = PriorScale(np.zeros(3), np.array([1.0, 100.0, 0.5]))
    sd = np.array([1.3e5, 50.0, np.nan])
    # 1.3e5 > 10 x 1; 50 <= 10 x 100 (a wide prior allows a wide start); nan is refused
    assert refused_coordinates(sd, lambda: prior) == [0, 2]
    limit = SPREAD_LIMIT * prior.sd[0]
    assert refused_coordinates(np.array([limit, 1.0, 1.0]), lambda: prior) == []
    assert refused_coordinates(np.array([limit * 1.01, 1.0, 1.0]), lambda: prior) == [0]


def test_sites_flatten_in_site_order_and_back() -> None:
    values = {"z_r": 0.5, "b_r": np.array([1.0, -2.0]), "z_precision": 3.0}
    sites, sizes = ("z_r", "b_r", "z_precision"), (1, 2, 1)
    flat = flatten_sites(values, sites)
    assert flat.tolist() == [0.5, 1.0, -2.0, 3.0]
    back = unflatten_sites(flat, sites, sizes)
    assert back["z_r"] == 0.5 and back["z_precision"] == 3.0
    np.testing.assert_array_equal(back["b_r"], [1.0, -2.0])


def cauchy_times_normal():
    """log p(z) = -log(1 + (z1 - 1)^2) - (z2 + 2)^2 / (2 x 0.25): mode (1, -2), curvature
    there diag(2, 4) (closed form; common practice, no source). For |z1 - 1| > 1 the first
    term is convex, so -Hessian has a negative eigenvalue there."""

    def log_p(at):
        z = at["z"]
        return -jnp.log1p((z[0] - 1.0) ** 2) - (z[1] + 2.0) ** 2 / 0.5

    return prior_terms(log_p, ("z",), (2,))


def test_the_exact_mode_search_starts_where_the_hessian_is_indefinite() -> None:
    terms = cauchy_times_normal()
    start = np.array([3.0, 0.0])
    assert np.min(np.linalg.eigvalsh(terms(start)[2])) < 0
    found = posterior_mode(terms, start)
    assert found is not None
    np.testing.assert_allclose(found[0], [1.0, -2.0], atol=1e-6)
    np.testing.assert_allclose(found[1], np.diag([0.5, 0.25]), rtol=1e-6)
    # the Laplace search's Newton step on the positive part of the curvature cannot start
    # there (its flat direction leaves the step undefined): why the exact search differs
    assert laplace_mode_from_precision(start, np.zeros((2, 2)), terms) is None


@pytest.fixture(scope="module")
def tiny_start():
    data = as_bundle(stopwise.load(TINY))
    # as fit_bayes does: r sampled below the CRRA cliff where the data rule out r >= 1
    model, _ = sample_below_cliff(
        build_model(MODEL), data, hierarchical=False, formulas=None, priors=None
    )
    pooled = ml_start(model, data, None, ML_POINT_FITS)
    setup, args, _, _, _ = prepare(
        model,
        data,
        hierarchical=False,
        formulas=None,
        priors=None,
        pointwise="trial",
        aggregate=True,
        centred=(),
    )
    sites = population_sites(setup)
    values = {s: 0.0 for s in sites}
    prior = prior_terms(lambda v: pooled_log_prior(setup, v), sites, flat_sizes(sites, values))
    return model, data, pooled, setup, args, sites, prior


def test_tiny_data_refuse_the_laplace_start(tiny_start) -> None:
    _, _, pooled, setup, _, sites, prior = tiny_start
    _, scales, _ = laplace_start(pooled, setup.names, setup.coef_names, sites, prior)
    assert max(float(np.max(scales[s])) for s in sites) > 1e3  # what the refusal is for


def negative_log_posterior(model, data, setup, z: np.ndarray) -> float:
    """-(sum over data rows of the model's loglik_obs + log prior of the intercepts), on the
    rows directly (no cells, no aggregation), in model parameter order."""
    theta = {spec.name: spec.to_natural(z[j]) for j, spec in enumerate(model.params)}
    rows = float(jnp.sum(model.loglik_obs(theta, data)))
    prior = sum(
        float(setup.priors[spec.name].log_density_unconstrained(spec, z[j]))
        for j, spec in enumerate(model.params)
    )
    return -(rows + prior)


def test_the_refused_start_is_the_exact_posterior_mode(tiny_start) -> None:
    model, data, pooled, setup, args, sites, prior = tiny_start
    assert list(sites) == [f"z_{n}" for n in model.param_names]
    checked = checked_pooled_start(setup, args, pooled, prior)
    assert checked.origin == EXACT_ORIGIN and checked.origin != LAPLACE_ORIGIN
    assert "Laplace start was refused" in checked.notes[0]
    mode = np.array([checked.values[s] for s in sites])
    cov = checked.inverse_mass[tuple(sites)]

    def f(z):
        return negative_log_posterior(model, data, setup, z)

    # independent optimiser (scipy's Nelder-Mead, package registry) on the rows' likelihood
    reference = optimize.minimize(
        f, mode + 0.5, method="Nelder-Mead", options={"xatol": 1e-8, "fatol": 1e-12}
    )
    np.testing.assert_allclose(mode, reference.x, atol=1e-4)
    # independent curvature: central second differences of f (common practice, no source)
    h, k = 1e-4, len(mode)
    hessian = np.empty((k, k))
    for i in range(k):
        for j in range(k):
            ei, ej = np.eye(k)[i] * h, np.eye(k)[j] * h
            hessian[i, j] = (
                f(mode + ei + ej) - f(mode + ei - ej) - f(mode - ei + ej) + f(mode - ei - ej)
            ) / (4 * h * h)
    np.testing.assert_allclose(cov, np.linalg.inv(hessian), rtol=1e-3)
    np.testing.assert_allclose(
        [checked.scales[s] for s in sites], np.sqrt(np.diag(cov)), rtol=1e-12
    )


def test_where_the_exact_mode_is_not_found_the_chains_start_at_the_prior(
    tiny_start, monkeypatch
) -> None:
    _, _, pooled, setup, args, sites, prior = tiny_start

    def nowhere(*_):  # an exact posterior that is nowhere finite: the search cannot start
        return lambda z: (-np.inf, np.full(z.size, np.nan), np.full((z.size, z.size), np.nan))

    monkeypatch.setattr(mode_start, "exact_posterior_terms", nowhere)
    checked = checked_pooled_start(setup, args, pooled, prior)
    assert checked.origin == PRIOR_ORIGIN and "prior's centre" in checked.notes[-1]
    j = list(sites).index("z_precision")
    # precision's default prior is LogNormal(log 1, 1.5) (estimation/bayes/priors.py): on
    # z = log(precision) it is Normal(0, 1.5), median 0 and curvature sd 1.5 exactly
    # (change of variables; common practice, no source); the median is taken from 2,001
    # draws, whose sampling sd is about 1.25 x 1.5 / sqrt(2001) = 0.04
    assert checked.values["z_precision"] == pytest.approx(0.0, abs=0.12)
    assert checked.scales["z_precision"] == pytest.approx(1.5, rel=1e-6)
    mass = checked.inverse_mass[tuple(sites)]
    np.testing.assert_allclose(mass, np.diag(np.diag(mass)))
    assert mass[j, j] == pytest.approx(1.5**2, rel=1e-6)


def test_the_products_fit_on_tiny_data_starts_at_the_exact_mode_and_moves() -> None:
    post = fit_bayes(
        MODEL,
        stopwise.load(TINY),
        chains=2,
        draws=200,
        warmup=200,
        seed=1,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    assert post.run["init"] == EXACT_ORIGIN
    assert any("Laplace start was refused" in n for n in post.notes)
    d = post.diagnostics
    assert d["divergences"] <= 0.05 * 2 * 200, d
    for name in ("r", "precision"):
        draws = np.asarray(post.idata.posterior[name].values)  # (chain, draw)
        assert draws.shape[0] == 2 and np.all(np.isfinite(draws))
        assert np.all(np.std(draws, axis=1) > 0), name  # no chain stuck at its start
