"""The compiled multistart (estimation/ml/compiled_multistart.py) against scipy's trust-exact
path: far-apart starts meet the same optimum, every cross-validation fold of the one batched
call equals its own scipy fit, and a start the compiled Newton does not bring to
convergence is redone by scipy and reported as such."""

from __future__ import annotations

import jax
import numpy as np
import pytest

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml import compiled_multistart as compiled_module
from stopwise.estimation.ml.compiled_multistart import COMPILED, FALLBACK, compiled_multistart
from stopwise.estimation.ml.mle import build_problem, fit_mle, starts_from
from stopwise.estimation.ml.optimize import multistart
from stopwise.estimation.ml.problem import Layout, PooledRows
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

SPEC = "crra+myopic+logit"


@pytest.fixture(scope="module")
def problem_and_layout():
    design = stopping_design(20, 25, (0.6, 0.75, 0.9), 1.0, 5)
    frame = build_model(SPEC).simulate({"r": 0.4, "precision": 2.0}, design, jax.random.PRNGKey(5))
    data = to_stopping_data(frame)
    problem, layout, _ = build_problem(build_model(SPEC), data)
    return problem, layout, data


def scipy_path(problem, starts, weights=None):
    """Today's path: scipy trust-exact from every start, then the Newton polish."""
    return multistart(
        lambda z: problem.value(z, weights),
        lambda z: problem.grad(z, weights),
        lambda z: problem.hess(z, weights),
        starts,
    )


def central_gradient(problem, z, weights=None, h=1e-5):
    """d negll / dz_j by central differences of the value alone (no JAX derivative)."""
    out = np.zeros(len(z))
    for j in range(len(z)):
        e = np.zeros(len(z))
        e[j] = h
        out[j] = (problem.value(z + e, weights) - problem.value(z - e, weights)) / (2 * h)
    return out


def test_far_apart_starts_of_the_two_paths_meet(problem_and_layout) -> None:
    problem, layout, _ = problem_and_layout
    # r = 4.9 sits near the upper end of (-3, 5) and precision = 60 is 30 times the truth:
    # there negll is astronomically large (a huge curvature in log precision beside a
    # negative one in r); an earlier step rule with one damping for all directions got stuck
    # at the edge of the unconstrained box from a start like this one.
    far = starts_from(problem, layout, [{"r": 4.9, "precision": 60.0}], 0)
    best_c, runs_c = compiled_multistart(problem, far)[0]
    best_s, _ = scipy_path(problem, problem.z0[None, :])
    assert runs_c[0].algorithm == COMPILED and best_c.converged
    assert np.max(np.abs(far[0] - problem.z0)) > 2.0  # the starts are far apart
    # Both are local optimisers; with a negative-definite Hessian at a unique maximum they
    # must reach the same point (common practice, no source): 1e-8 relative is the
    # project's agreement goal of issue 13.
    np.testing.assert_allclose(best_c.z, best_s.z, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(best_c.value, best_s.value, rtol=1e-12)
    # stationarity checked without JAX derivatives: central differences of the value
    assert np.max(np.abs(central_gradient(problem, best_c.z))) < 1e-3
    assert np.all(np.linalg.eigvalsh(problem.hess(best_c.z)) > 0)


def test_every_fold_of_the_batched_call_equals_its_own_scipy_fit(problem_and_layout) -> None:
    problem, layout, _ = problem_and_layout
    starts = starts_from(problem, layout, 3, 0)
    fold_of = np.arange(problem.n_clusters) % 4
    weights = [problem.cluster_weights((fold_of != f).astype(float)) for f in range(4)]
    batched = compiled_multistart(problem, starts, 200, weights)
    fold_optima = []
    for (best, runs), w in zip(batched, weights):
        reference, _ = scipy_path(problem, starts, w)
        assert best.converged and all(r.algorithm == COMPILED for r in runs)
        np.testing.assert_allclose(best.z, reference.z, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(best.value, reference.value, rtol=1e-12)
        fold_optima.append(best.z)
    # the folds' weights reach the program: dropping a quarter of the subjects moves the
    # estimate (were every fold fitted on all rows, the four optima would coincide)
    assert np.ptp(np.array(fold_optima), axis=0).max() > 1e-4


def test_a_start_the_compiled_newton_leaves_unconverged_is_rerun_by_scipy_and_reported(
    problem_and_layout, monkeypatch
) -> None:
    problem, layout, data = problem_and_layout
    real = compiled_module.newton_runs

    def first_start_fails(rows, starts, args, weights, max_iter):
        z, v, g, h, gmax, iters = real(rows, starts, args, weights, max_iter)
        # as a run that ends with a non-finite objective (a device-side failure)
        return z, v.at[:, 0].set(np.nan), g, h, gmax.at[:, 0].set(np.inf), iters

    monkeypatch.setattr(compiled_module, "newton_runs", first_start_fails)
    fit = fit_mle(build_model(SPEC), data, se="hessian", starts=3)
    assert fit.converged
    assert fit.optimizer["start_algorithms"] == [FALLBACK, COMPILED, COMPILED]
    assert fit.to_dict()["optimizer"]["start_algorithms"][0] == FALLBACK
    reference, _ = scipy_path(problem, starts_from(problem, layout, 3, 0))
    np.testing.assert_allclose(fit.z, reference.z, rtol=1e-8, atol=1e-10)


def test_host_callback_and_mixture_rows_keep_the_scipy_path() -> None:
    """Contest Nash play is solved on the host (jax.pure_callback); inside the compiled
    loop that callback deadlocked a whole `stopwise demo`. Such rows, and finite mixtures,
    must not enter the compiled loop; every other row function does."""

    def rows(spec: str) -> PooledRows:
        model = build_model(spec)
        free = tuple(model.param_names)
        return PooledRows(Layout(model, free, (1,) * len(free)))

    assert not compiled_module.compiled_path_suits(rows("crra+nash+tremble"))
    # QRE and level-k play run in the loop again (their LU deadlock is gone:
    # tests/test_small_solve.py, tests/test_contest_compiled_slow.py)
    assert compiled_module.compiled_path_suits(rows("crra+qre"))
    assert compiled_module.compiled_path_suits(rows("linear+levelk"))
    assert compiled_module.compiled_path_suits(rows("crra+planner+logit"))

    class MixtureLike:
        multimodal = True

    assert not compiled_module.compiled_path_suits(MixtureLike())
