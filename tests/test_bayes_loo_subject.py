"""Leave-one-subject-out (estimation/bayes/loo_subject.py) against the exact answer of a tiny
conjugate problem: PSIS terms, exact refits and K-fold by subject all reproduce
log p(y_s | y_-s) computed in closed form."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import special
from test_bayes_engine import CONSTANT, bernoulli_bundle

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.estimation.bayes import loo_subject
from stopwise.estimation.bayes.fit import compare_bayes, fit_bayes
from stopwise.estimation.ml.point_fits import ML_POINT_FITS

A, B = 2.0, 3.0  # Beta prior of the draw probability
SETTINGS = dict(chains=2, draws=500, warmup=300, progress=False)


def exact_subject_elpd(draw: np.ndarray, subject: np.ndarray) -> np.ndarray:
    """log p(y_s | y_-s) for a Bernoulli sequence under a Beta(A, B) prior: the posterior
    from everyone else is Beta(a, b) with a = A + successes, b = B + failures of the others,
    and p(y_s | y_-s) = B(a + k_s, b + n_s - k_s) / B(a, b) (Beta-Bernoulli conjugacy,
    Gelman et al. 2013, BDA3, ch. 2.4; common practice)."""
    out = []
    for s in np.unique(subject):
        mine = subject == s
        k, n = draw[mine].sum(), mine.sum()
        a = A + draw[~mine].sum()
        b = B + (~mine).sum() - draw[~mine].sum()
        out.append(special.betaln(a + k, b + n - k) - special.betaln(a, b))
    return np.asarray(out)


def monte_carlo_tolerance(draw: np.ndarray, subject: np.ndarray, ess: float = 400.0) -> np.ndarray:
    """Four Monte Carlo standard errors of log mean_d w_d, w = p(y_s | p_d), p_d from the
    posterior without subject s: by the delta method se = sd(w) / (E[w] sqrt(ESS)), with
    E[w^2] / E[w]^2 = B(a + 2k, b + 2(n - k)) B(a, b) / B(a + k, b + n - k)^2 in closed form
    and a conservative ESS of 400 for 2 x 500 draws."""
    out = []
    for s in np.unique(subject):
        mine = subject == s
        k, n = draw[mine].sum(), mine.sum()
        a = A + draw[~mine].sum()
        b = B + (~mine).sum() - draw[~mine].sum()
        log_ratio = (
            special.betaln(a + 2 * k, b + 2 * (n - k))
            + special.betaln(a, b)
            - 2 * special.betaln(a + k, b + n - k)
        )
        out.append(4.0 * np.sqrt(np.expm1(log_ratio)) / np.sqrt(ess))
    return np.asarray(out)


@pytest.fixture(scope="module")
def tiny():
    rng = np.random.default_rng(4)
    subject = np.repeat(np.arange(5), 8)
    p = np.array([0.2, 0.3, 0.5, 0.25, 0.9])[subject]  # subject 4 is unlike the others
    draw = (rng.random(subject.size) < p).astype(float)
    return bernoulli_bundle(draw, subject), draw, subject


@pytest.fixture(scope="module")
def tiny_fit(tiny):
    data, _, _ = tiny
    return fit_bayes(
        CONSTANT,
        data,
        priors={"p": f"beta({A}, {B})"},
        seed=7,
        **SETTINGS,
        point_fits=ML_POINT_FITS,
    )


def test_default_unit_is_the_subject_and_matches_the_exact_answer(tiny, tiny_fit):
    _, draw, subject = tiny
    exact = exact_subject_elpd(draw, subject)
    summary = tiny_fit.loo_summary()
    assert summary["unit"] == "subject" and summary["n_units"] == 5
    terms = np.asarray(tiny_fit.loo()["loo_i"].values)
    k = np.asarray(tiny_fit.loo()["pareto_k"].values)
    # subjects with a small Pareto k: PSIS is close (Monte Carlo error of 1,000 draws). At
    # this seed the unusual subject 4 has k = 0.47 and PSIS misses by 0.30 log units: below
    # the 0.7 threshold the estimate is kept, as Vehtari et al. (2017) advise
    close = k < 0.3
    assert close.sum() >= 3
    tolerance = monte_carlo_tolerance(draw, subject)
    assert np.all((np.abs(terms - exact) < tolerance)[close]), (terms, exact, k)
    assert summary["elpd_loo"] == pytest.approx(exact.sum(), abs=0.5)
    assert json.loads(tiny_fit.to_json())["diagnostics"]["loo"]["unit"] == "subject"


def refit_for(data_kw):
    def refit(data, seed):
        return fit_bayes(
            CONSTANT, data, seed=seed, loo_refits=False, **data_kw, point_fits=ML_POINT_FITS
        )

    return refit


@pytest.mark.slow
def test_exact_refits_reproduce_brute_force_leave_one_subject_out(tiny, tiny_fit):
    _, draw, subject = tiny
    exact = exact_subject_elpd(draw, subject)
    psis = tiny_fit.loo()
    k = np.array([0.1, 0.9, 0.1, 0.1, 0.9])  # pretend subjects 1 and 4 were flagged
    result = loo_subject.repair(
        tiny_fit,
        np.asarray(psis["loo_i"].values),
        k,
        refit_for({"priors": {"p": f"beta({A}, {B})"}, **SETTINGS}),
        has_formulas=False,
    )
    assert result.refits == 2 and result.repaired == [1, 4]
    assert "2 subjects with Pareto k > 0.7 refitted exactly" in result.method
    unflagged = [0, 2, 3]
    assert np.array_equal(result.elpd_i[unflagged], np.asarray(psis["loo_i"].values)[unflagged])
    tolerance = monte_carlo_tolerance(draw, subject)
    assert np.all(np.abs(result.elpd_i - exact) < tolerance), (result.elpd_i, exact, tolerance)
    corrected = loo_subject.corrected_elpd(psis, result)
    assert float(corrected["elpd_loo"]) == pytest.approx(result.elpd_i.sum())
    assert np.isnan(np.asarray(corrected["pareto_k"].values)[[1, 4]]).all()


@pytest.mark.slow
def test_k_fold_by_subject_fallback_when_too_many_are_flagged(tiny, tiny_fit):
    _, draw, subject = tiny
    exact = exact_subject_elpd(draw, subject)
    psis = tiny_fit.loo()
    result = loo_subject.repair(
        tiny_fit,
        np.asarray(psis["loo_i"].values),
        np.full(5, 0.9),
        refit_for({"priors": {"p": f"beta({A}, {B})"}, **SETTINGS}),
        has_formulas=False,
        max_exact=2,
        folds=5,  # 5 folds of 5 subjects: one subject per fold, exact leave-one-out again
    )
    assert result.refits == 5 and result.method.startswith("5-fold cross-validation by subject")
    tolerance = monte_carlo_tolerance(draw, subject)
    assert np.all(np.abs(result.elpd_i - exact) < tolerance), (result.elpd_i, exact, tolerance)


def test_without_subjects_renumbers_codes_and_labels(tiny):
    data, _, _ = tiny
    labelled = data.__class__(**{**data.__dict__, "subject_labels": np.array(list("abcde"))})
    kept = loo_subject.without_subjects(labelled, [1, 3])
    assert sorted(set(np.asarray(kept.subject).tolist())) == [0, 1, 2]
    assert list(kept.subject_labels) == ["a", "c", "e"] and kept.n_subjects == 3
    assert kept.n_obs == 24


@pytest.mark.slow
def test_compare_says_its_unit(tiny, tiny_fit):
    data, _, _ = tiny
    other = fit_bayes(
        CONSTANT, data, seed=8, **SETTINGS, point_fits=ML_POINT_FITS
    )  # default prior: another model
    table = compare_bayes([tiny_fit, other], names=["beta prior", "default prior"])
    assert any("leave-one-subject-out" in n for n in table.notes)
    assert table.to_dict()["unit"] == "subject"
