"""Simulation-based calibration: the rank-histogram band, its power against a biased
sampler, and the compiled SBC sampler against the product's own steps and a quadrature
posterior (benchmarks/sbc_ranks.py, benchmarks/sbc_sampler.py, benchmarks/study_sbc.py)."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

import stopwise
from benchmarks import sbc_ranks as R
from benchmarks import sbc_sampler as S
from benchmarks import study_sbc
from stopwise.estimation.bayes.density import jitted_intercept_prior, jitted_total_loglik
from stopwise.estimation.bayes.fit_steps import cells_for_sampling, sampler_start
from stopwise.estimation.bayes.pooled_start import ml_start
from stopwise.estimation.bayes.prepare import as_bundle
from stopwise.estimation.bayes.sampler import mass_matrix_settings
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.models.spec import build_model

# ---------------------------------------------------------------------------------------
# The band.


@pytest.mark.parametrize("n", [40, 200, 1000])
def test_band_limits_are_the_binomial_quantiles_at_the_bonferroni_level(n: int) -> None:
    # Each bin of N uniform ranks in 10 bins is Binomial(N, 1/10); Bonferroni over 10 bins
    # and 2 tails puts 0.01 / 20 in each tail (common practice, no source). scipy.stats.binom
    # is the reference: lo is the smallest count whose CDF reaches the tail level, hi the
    # smallest whose upper tail is at most it.
    lo, hi = R.simultaneous_band(n)
    tail = 0.01 / 20
    assert stats.binom.cdf(lo - 1, n, 0.1) <= tail < stats.binom.cdf(lo, n, 0.1)
    assert stats.binom.sf(hi, n, 0.1) <= tail < stats.binom.sf(hi - 1, n, 0.1)


def test_uniform_rank_histograms_stay_inside_the_band_at_least_99_percent_of_the_time() -> None:
    # Bonferroni's inequality guarantees simultaneous coverage >= 0.99; 20,000 simulated
    # Multinomial(1000, 1/10) histograms measure it (binomial sd of the share 0.0007).
    coverage = R.band_coverage(1000, 20_000, seed=5)
    assert coverage >= 0.99 - 4 * np.sqrt(0.99 * 0.01 / 20_000)
    assert coverage < 0.999  # not a band so wide that nothing could leave it


def conjugate_ranks(n: int, seed: int, sd_factor: float = 1.0, shift: float = 0.0) -> list:
    """SBC ranks for theta ~ N(0, 1), y | theta ~ N(theta, 1), whose posterior is
    N(y / 2, 1 / 2) (normal-normal conjugacy, a fact of the trade, common practice, no
    source); ``sd_factor`` and ``shift`` make a biased sampler."""
    rng = np.random.default_rng(seed)
    ranks = []
    for _ in range(n):
        theta = rng.normal()
        y = rng.normal(theta, 1.0)
        sd = np.sqrt(0.5) * sd_factor
        draws = rng.normal(y / 2 + shift * np.sqrt(0.5), sd, study_sbc.KEPT)
        ranks.append(R.rank_of_truth(draws, theta))
    return ranks


def verdict(ranks: list) -> bool:
    counts = R.bin_counts(ranks, study_sbc.KEPT)
    return R.inside_band(counts, R.simultaneous_band(len(ranks)))


def test_an_exact_sampler_passes_and_biased_samplers_fail_the_band() -> None:
    assert verdict(conjugate_ranks(1000, seed=1))
    # Talts et al. (2018), Figs. 3-5: an under-dispersed posterior piles ranks at both
    # ends, an over-dispersed one in the middle, a shifted one on one side.
    assert not verdict(conjugate_ranks(1000, seed=1, sd_factor=0.7))
    assert not verdict(conjugate_ranks(1000, seed=1, sd_factor=1.4))
    assert not verdict(conjugate_ranks(1000, seed=1, shift=0.3))


def test_ranks_are_binned_and_thinned_as_stated() -> None:
    assert R.bin_counts([0, 9, 10, 99], 99).tolist() == [2, 1, 0, 0, 0, 0, 0, 0, 0, 1]
    with pytest.raises(ValueError, match="ranks must lie"):
        R.bin_counts([100], 99)
    with pytest.raises(ValueError, match="equal bins"):
        R.bin_counts([0], 98)
    x = np.arange(20).reshape(2, 10)
    assert R.thinned(x, 5, 3).tolist() == [0, 5, 10]
    with pytest.raises(ValueError, match="needed"):
        R.thinned(x, 5, 5)


def test_chains_that_start_where_the_density_is_not_finite_are_drawn_again() -> None:
    sampler = object.__new__(S.CompiledSampler)
    sampler.chains = 6
    # a stand-in for the potential's check: finite only inside |z| < 1
    sampler._finite = lambda z0, _: jnp.abs(z0["z_r"]) < 1.0
    prepared = S.Prepared(None, None, {"z_r": 0.0}, {"z_r": 2.0}, None, None, ())
    key = jax.random.PRNGKey(3)
    first = sampler.start_points(key, prepared)["z_r"]
    assert np.any(np.abs(first) >= 1.0) and np.any(np.abs(first) < 1.0)
    z0, redraws = sampler.finite_start_points(key, prepared, None)
    assert np.all(np.abs(z0["z_r"]) < 1.0) and redraws >= int(np.sum(np.abs(first) >= 1.0))
    kept = np.abs(first) < 1.0
    np.testing.assert_array_equal(np.asarray(z0["z_r"])[kept], np.asarray(first)[kept])
    # where every start is finite, nothing is drawn again and the starts are the first ones
    sampler._finite = lambda z0, _: jnp.ones(6, bool)
    z0, redraws = sampler.finite_start_points(key, prepared, None)
    assert redraws == 0
    np.testing.assert_array_equal(z0["z_r"], first)


def test_replications_whose_chains_hardly_moved_are_reported_by_index() -> None:
    def outcome(ess: float) -> dict:
        return {"ranks": {"r": 1}, "divergent": 0, "min_ess": ess, "laplace": True, "residual": 0}

    outcomes = [outcome(150.0), outcome(2.05), None, {"error": "ValueError: x"}, outcome(5.0)]
    result = study_sbc.summarise(
        "crra+logit", 5, outcomes, study_sbc.Sampling(), "in-process", 0.0, 0.0
    )
    assert result["frozen"] == [1]  # ESS 2.05: 500 identical draws per chain
    assert "hardly moved (smallest bulk ESS under 5): 1 (1)" in study_sbc.section(result)


def test_a_second_study_has_its_own_keys_file_and_resumes_only_itself(tmp_path) -> None:
    first, second = study_sbc.replication_keys(3), study_sbc.replication_keys(3, seed=7)
    assert not any(np.array_equal(a, b) for a in first for b in second)
    assert study_sbc.study_slug("crra+ch") == "crra_ch"
    assert study_sbc.study_slug("crra+ch", 7) == "crra_ch_seed7"
    sampling = study_sbc.Sampling()
    path = tmp_path / "saved.json"
    outcome = {"ranks": {"r": 3}, "divergent": 0, "min_ess": 100.0, "laplace": True}
    payload = {"spec": "crra+ch", "seed": 7, "outcomes": [outcome], "sampling": sampling.__dict__}
    study_sbc.save_atomically(str(path), {**payload, "seconds": 1.0, "cpu": 1.0})
    mine, _, _ = study_sbc.resumed("crra+ch", sampling, 2, str(path), seed=7)
    other, _, _ = study_sbc.resumed("crra+ch", sampling, 2, str(path))
    assert mine == [outcome, None] and other == [None, None]


# ---------------------------------------------------------------------------------------
# The compiled sampler against the product.


def lottery_replication(seed: int) -> tuple:
    model = build_model("crra+logit")
    design = study_sbc.MODELS["crra+logit"][1]()
    truth = {"r": 0.4, "precision": 1.5}
    frame = model.simulate(truth, design, jax.random.PRNGKey(seed))
    return model, stopwise.load(frame)


def test_study_and_product_adapt_the_laplace_mass_matrix_with_the_same_settings() -> None:
    # issue 16 item 1: the Laplace matrix starts the warm-up and is adapted, in the product
    # (run_nuts) and in the study's compiled sampler alike (one function gives both)
    model, data = lottery_replication(3)
    setup, *_ = cells_for_sampling(model, as_bundle(data), False, None, None, "row", True, (), [])
    assert S.mass_matrix_settings is mass_matrix_settings
    block = ("z_r", "z_precision")
    inverse = {block: np.array([[0.04, 0.01], [0.01, 0.09]])}
    laplace = mass_matrix_settings(setup, True, inverse)
    assert laplace["adapt_mass_matrix"] is True and laplace["dense_mass"] == [block]
    np.testing.assert_array_equal(laplace["inverse_mass_matrix"][block], inverse[block])
    identity = mass_matrix_settings(setup, False, None)
    assert identity == {"dense_mass": False, "inverse_mass_matrix": None, "adapt_mass_matrix": True}


@pytest.mark.slow  # an ML fit and three compiled programs: about a minute on a loaded machine
def test_the_start_is_the_products_pooled_start_and_padding_keeps_the_likelihood() -> None:
    model, data = lottery_replication(3)
    prepared = S.prepare_replication(model, data, ML_POINT_FITS)
    bundle = as_bundle(data)
    pooled = ml_start(model, bundle, None, ML_POINT_FITS)
    setup, args, *_ = cells_for_sampling(model, bundle, False, None, None, "row", True, (), [])
    product = sampler_start(setup, args, pooled.natural, pooled, None, False, None)
    assert prepared.laplace and product.dense_mass
    for name, value in product.values.items():
        assert prepared.values[name] == pytest.approx(value, abs=1e-12)
        assert prepared.scales[name] == pytest.approx(product.scales[name], abs=1e-12)
    (key, mass), (key2, mass2) = *prepared.inverse_mass.items(), *product.inverse_mass.items()
    assert key == key2
    np.testing.assert_allclose(mass, mass2, rtol=1e-10, atol=1e-14)
    shape = S.Shape(rows=S.padded_shape(prepared.args).rows + 32)
    padded = S.pad_args(prepared.args, shape)
    assert padded.weight.shape[1] == shape.rows and float(padded.weight[:, -1].sum()) == 0.0
    assert S.row_sum_residual(prepared, padded) <= 1e-12
    for z in ([0.3, -1.0], [-0.5, 1.2]):  # away from the start too
        sites = {"z_r": jnp.asarray(z[0]), "z_precision": jnp.asarray(z[1])}
        a = float(jitted_total_loglik(prepared.setup, sites, prepared.args))
        b = float(jitted_total_loglik(prepared.setup, sites, padded))
        assert a == pytest.approx(b, rel=1e-12)


def quadrature_moments(prepared: S.Prepared, half_width: float = 7.0, n: int = 161) -> dict:
    """Posterior means and sds of the unconstrained sites by a 2-D grid (midpoint rule) of
    prior x likelihood around the ML start, +- half_width Laplace sds: an independent
    computation of what the sampler should reproduce."""
    setup = prepared.setup
    ((sites, cov),) = prepared.inverse_mass.items()
    centre = np.asarray([prepared.values[s] for s in sites])
    sd = np.sqrt(np.diag(cov))
    axes = [c + s * np.linspace(-half_width, half_width, n) for c, s in zip(centre, sd)]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, 2)

    def log_post(z):
        point = dict(zip(sites, z))
        return jitted_total_loglik(setup, point, prepared.args) + jitted_intercept_prior(
            setup, point
        )

    lp = np.asarray(jax.jit(jax.vmap(log_post))(jnp.asarray(grid)))
    w = np.exp(lp - lp.max())
    w /= w.sum()
    mean = w @ grid
    var = w @ (grid - mean) ** 2
    return {s: (mean[i], np.sqrt(var[i])) for i, s in enumerate(sites)}


@pytest.mark.slow  # compiles the NUTS program: minutes on a loaded machine
def test_the_compiled_sampler_reproduces_the_quadrature_posterior() -> None:
    model, data = lottery_replication(8)
    prepared = S.prepare_replication(model, data, ML_POINT_FITS)
    shape = S.padded_shape(prepared.args)
    padded = S.pad_args(prepared.args, shape)
    sampler = S.CompiledSampler(prepared.setup, padded, True, chains=2, warmup=200, draws=1000)
    z, divergent, _ = sampler.draw(jax.random.PRNGKey(0), prepared, padded)
    assert divergent == 0
    for site, (mean, sd) in quadrature_moments(prepared).items():
        x = z[site].reshape(-1)
        # 2,000 draws, effective size at least 500 (checked by the study's ESS column):
        # the mean within 5 Monte Carlo sds, the sd within 15%
        assert abs(x.mean() - mean) <= 5 * sd / np.sqrt(500), site
        assert x.std() == pytest.approx(sd, rel=0.15), site


@pytest.mark.slow
def test_a_small_calibration_study_runs_every_replication_and_passes() -> None:
    # 100 replications of the lottery model: every one ranked, the checks recorded, the
    # ranks inside the 99% band (a grossly miscalibrated sampler fails at this size too:
    # see the conjugate test above). Invented design; truths drawn from the priors.
    result = study_sbc.run("crra+logit", 100)
    assert result["replications"] == 100 and result["failed"] == [] and result["not_run"] == 0
    assert result["max_residual"] <= 1e-9
    assert all(p["inside"] for p in result["params"].values()), result["params"]
    assert result["ess_median"] >= study_sbc.DRAWS * study_sbc.CHAINS / study_sbc.THIN


@pytest.mark.slow  # a contest ML fit and its programs: about 20 s (the product's rule is
# checked in the fast suite by tests/test_recovery_horizon.py)
def test_the_harness_pads_the_horizon_only_where_the_likelihood_allows_it() -> None:
    """A contest model's targets extend to the data's horizon (models/contest/build.py), so
    the harness keeps the data's horizon for it; padding it (the solo models' shortcut)
    changes the log-likelihood on replication 3 of the crra+ch study, which the harness's own
    row-sum check caught before this rule."""
    options, make_design = study_sbc.MODELS["crra+ch"]
    model = build_model("crra+ch", **options)
    assert not (model.options or {}).get("horizon_invariant")
    k_truth, k_sim, _ = jax.random.split(jnp.asarray(study_sbc.replication_keys(4)[3]), 3)
    truth = study_sbc.draw_truth(model, study_sbc.resolve_priors(model), k_truth)
    frame = model.simulate(truth, make_design(), k_sim)
    prepared = S.prepare_replication(model, stopwise.load(frame), ML_POINT_FITS)
    kept = S.padded_shape(prepared.args, pad_horizon=False)
    assert kept.horizon == int(prepared.args.data.horizon)
    assert S.row_sum_residual(prepared, S.pad_args(prepared.args, kept)) <= 1e-9
    padded = S.padded_shape(prepared.args)
    assert padded.horizon > kept.horizon
    assert S.row_sum_residual(prepared, S.pad_args(prepared.args, padded)) > 1e-6


def test_compiled_programs_are_released_when_the_process_holds_too_many_mappings() -> None:
    """A long study drops its compiled programs before Linux's ceiling on memory mappings
    (65,530 by default; a crra+ch study died in LLVM after 170 replications without this)."""
    held = S.memory_mappings()
    assert held is None or held > 0
    S._PROGRAMS[("placeholder",)] = None  # type: ignore[assignment]
    assert not S.release_when_crowded(limit=10**9)
    assert ("placeholder",) in S._PROGRAMS
    released = S.release_when_crowded(limit=0)
    assert released is (held is not None)
    if released:
        assert not S._PROGRAMS and not S._ROW_SUMS
    S._PROGRAMS.pop(("placeholder",), None)
