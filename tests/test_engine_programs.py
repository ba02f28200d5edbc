"""The ML engine's compiled programs (estimation/ml/problem.py): the per-step program and the
once-per-fit row scores agree with the previous combined value/gradient/Hessian/row-Jacobian
function, and refits of one model share their compiled programs."""

from __future__ import annotations

import re
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml import problem as engine
from stopwise.estimation.ml.compare import cv_log_score
from stopwise.estimation.ml.mle import build_problem, fit_mle
from stopwise.estimation.ml.optimize import newton_polish
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model
from stopwise.models.stopping import computed_once, gather_rows

PREVIOUS_COMPILE_OPTIONS = {
    "xla_backend_optimization_level": 0,
    "xla_llvm_disable_expensive_passes": True,
}


@partial(jax.jit, static_argnums=0, compiler_options=PREVIOUS_COMPILE_OPTIONS)
def previous_combined(rows, z, args, w):
    """The engine's former single program (value, gradient, Hessian, row Jacobian in one
    forward-mode pass, reduced XLA optimisation), kept here as the reference."""
    k = z.shape[0]

    def inner(zz):
        lls, jac_t = jax.vmap(lambda v: jax.jvp(lambda a: rows(a, args), (zz,), (v,)))(jnp.eye(k))
        grad = -jnp.sum(jnp.where(w[None, :] > 0, w[None, :] * jac_t, 0.0), axis=1)
        value = -jnp.sum(jnp.where(w > 0, w * lls[0], 0.0))
        return grad, (value, grad, jac_t.T)

    hess, (value, grad, jac) = jax.jacfwd(inner, has_aux=True)(z)
    return value, grad, 0.5 * (hess + hess.T), jac


def simulated(spec: str, subjects: int = 12, trials: int = 20, seed: int = 3):
    model = build_model(spec)
    design = stopping_design(subjects, trials, (0.6, 0.75, 0.9), 1.0, seed)
    design["treated"] = (design["subject"].astype("category").cat.codes % 2).astype(float)
    frame = model.simulate({"r": 0.4, "precision": 2.0}, design, jax.random.PRNGKey(seed))
    return model, frame, to_stopping_data(frame, covariates=["treated"])


def assert_relative(a, b, rtol: float = 1e-8) -> None:
    a, b = np.asarray(a), np.asarray(b)
    scale = np.maximum(np.abs(b), np.max(np.abs(b)) * 1e-12 + 1e-300)
    assert np.all(np.abs(a - b) <= rtol * scale), float(np.max(np.abs(a - b) / scale))


@pytest.mark.parametrize(
    ("spec", "formulas"),
    [
        ("crra+planner+logit", None),
        ("crra+myopic+logit", None),
        ("crra+myopic+logit", ["r ~ 1 + treated"]),
    ],
)
def test_fast_path_equals_the_previous_combined_function(spec, formulas) -> None:
    model, _, data = simulated(spec)
    problem, _, _ = build_problem(model, data, formulas=formulas)
    w = problem.weights.copy()
    w[problem.cluster == 1] *= 2.0  # a bootstrap-like weighting as well as the padding mask
    for z in (problem.z0 + 0.1, problem.z0 - 0.3):
        ref = [
            np.asarray(a)
            for a in previous_combined(problem.rows, jnp.asarray(z), problem.args, jnp.asarray(w))
        ]
        value, grad, hess = problem.second_order(z, w)
        assert_relative(value, ref[0])
        assert_relative(grad, ref[1])
        assert_relative(hess, ref[2])
        assert_relative(problem.row_jacobian(z), ref[3])
        assert np.array_equal(problem.evaluate(z, w)[3], problem.row_jacobian(z))


def test_clustered_scores_equal_the_previous_jacobian_summed_by_subject() -> None:
    model, _, data = simulated("crra+planner+logit")
    problem, _, _ = build_problem(model, data)
    z = problem.z0 + 0.2
    jac = np.asarray(
        previous_combined(problem.rows, jnp.asarray(z), problem.args, jnp.asarray(problem.weights))[
            3
        ]
    )
    expected = pd.DataFrame(jac[: data.n_obs]).groupby(np.asarray(data.subject)).sum().to_numpy()
    assert_relative(problem.cluster_scores(z), expected)


def test_refits_of_one_model_share_the_compiled_programs() -> None:
    model, _, data = simulated("crra+myopic+logit", subjects=15, seed=4)
    fit_mle(model, data, se="robust", starts=3)  # compiles (or loads) both programs
    step_programs = engine.value_grad_hess._cache_size()
    score_programs = engine.row_scores._cache_size()
    fit_mle(model, data, se="robust", starts=2, seed=1)
    cv_log_score(model, data, folds=3, seed=0)
    trial = np.asarray(data.trial)
    part = data.take(np.flatnonzero(trial != trial.max()))  # another data set, same bucket
    assert engine.padded_size(part.n_obs) == engine.padded_size(data.n_obs) > part.n_obs
    fit_mle(model, part, se="robust", starts=1)
    assert engine.value_grad_hess._cache_size() == step_programs
    assert engine.row_scores._cache_size() == score_programs


def test_spec_strings_naming_one_model_share_programs_and_numbers() -> None:
    _, frame, data = simulated("crra+myopic+logit", subjects=14, seed=5)
    first = stopwise.fit("crra+myopic+logit", data)
    step_programs = engine.value_grad_hess._cache_size()
    again = stopwise.fit("crra+myopic+logit", data)
    assert engine.value_grad_hess._cache_size() == step_programs
    assert again.extras["layout"].model is first.extras["layout"].model
    np.testing.assert_array_equal(again.z, first.z)
    np.testing.assert_array_equal(again.params["se"], first.params["se"])
    # other survival chances size the caps differently: another model, not a stale program
    other = to_stopping_data(frame[frame["p_survive"] < 0.8])
    third = stopwise.fit("crra+myopic+logit", other)
    assert third.extras["layout"].model is not first.extras["layout"].model


def test_newton_polish_reaches_the_optimum_from_where_an_optimiser_stops() -> None:
    model, _, data = simulated("crra+planner+logit")
    fit = fit_mle(model, data, se=None, starts=1)
    problem = fit.extras["problem"]
    near = fit.z + np.array([2e-4, -3e-4])  # an optimiser stopping short: max |g| ~ 1e-2
    assert np.max(np.abs(problem.grad(near))) > 1e-4
    polished = newton_polish(problem.value, problem.grad, problem.hess, near)
    assert np.max(np.abs(problem.grad(polished))) < 1e-8
    np.testing.assert_allclose(polished, fit.z, rtol=1e-9)


def test_newton_polish_refuses_an_indefinite_hessian_and_a_rising_step() -> None:
    # Newton's method facts (common practice, no source): at a saddle the Hessian is not
    # positive definite; for f(z) = sqrt(1 + z^2) the full Newton step from z = 2 is
    # z (1 + z^2) = 10, landing at -8 where f is larger, so it must be refused.
    def saddle_value(z):
        return float(z[0] ** 2 - z[1] ** 2 + 0.1 * z[0])

    def saddle_grad(z):
        return np.array([2 * z[0] + 0.1, -2 * z[1]])

    start = np.array([1.0, 0.5])
    kept = newton_polish(saddle_value, saddle_grad, lambda z: np.diag([2.0, -2.0]), start)
    np.testing.assert_array_equal(kept, start)

    def value(z):
        return float(np.sqrt(1 + z[0] ** 2))

    def grad(z):
        return np.array([z[0] / np.sqrt(1 + z[0] ** 2)])

    def hess(z):
        return np.array([[(1 + z[0] ** 2) ** -1.5]])

    np.testing.assert_array_equal(newton_polish(value, grad, hess, np.array([2.0])), [2.0])
    assert abs(newton_polish(value, grad, hess, np.array([0.3]))[0]) < 1e-9  # converges


def row_fusions_reading_the_table(problem) -> list[str]:
    """Compiled computations (other than the entry) that work on row-shaped arrays and
    evaluate log1p, the logit table's transcendental: the table recomputed per row."""
    args, w = problem.on_device()
    compiled = engine.value_grad_hess.lower(problem.rows, jnp.asarray(problem.z0), args, w)
    text = compiled.compile().as_text()
    row_shape = f"f64[{len(problem.weights)}"
    parts = re.split(r"\n(?=%?\S+ \(|ENTRY)", text)
    return [
        p.split()[0]
        for p in parts
        if not p.startswith("ENTRY") and row_shape in p and "log-plus-one" in p
    ]


def test_myopic_table_is_computed_once_not_per_row() -> None:
    """Without stopping.computed_once XLA fused the myopic table's construction into the
    row gather (found 2026-12-02 in the compiled program: one fusion held log-plus-one on
    the (n_cond, n_steps) table next to the f64[rows] gather), so every row and tangent
    recomputed its entry."""
    model, _, data = simulated("crra+myopic+logit")
    problem, _, _ = build_problem(model, data)
    assert row_fusions_reading_the_table(problem) == []


def test_computed_once_returns_the_table_bit_for_bit_and_the_gather_reads_it() -> None:
    table = jnp.asarray([-0.0, -1.5, -np.inf, -1e-300, 3.25])
    for anchor in (jnp.asarray([1.0, 2.0]), jnp.asarray([np.nan])):
        same = jax.jit(computed_once)(table, anchor)
        assert np.array_equal(np.asarray(same), np.asarray(table))
    _, _, data = simulated("crra+myopic+logit")
    shape = (len(np.asarray(data.cond_gain)), int(data.horizon))
    log_draw, log_stop = -np.random.default_rng(0).exponential(size=(2, *shape))
    cond, step = np.asarray(data.cond), np.asarray(data.step)
    expected = np.where(np.asarray(data.draw) > 0.5, log_draw[cond, step], log_stop[cond, step])
    rows = jax.jit(gather_rows)(jnp.asarray(log_draw), jnp.asarray(log_stop), data)
    assert np.array_equal(np.asarray(rows), expected)
