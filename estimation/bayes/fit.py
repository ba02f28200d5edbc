"""Bayesian estimation with NumPyro's NUTS: any model's ``loglik_obs`` wrapped automatically.

``fit_bayes`` runs the named steps: check the options, prepare the data in cells
(estimation/bayes/prepare.py), choose the start (estimation/bayes/initial.py), run NUTS
(estimation/bayes/sampler.py) on the density (estimation/bayes/density.py), check a planner
cap (estimation/bayes/truncation.py), summarise (estimation/bayes/posterior.py) and repair
leave-one-subject-out terms (estimation/bayes/loo_subject.py).
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes import loo_subject
from stopwise.estimation.bayes.assemble import build_posterior
from stopwise.estimation.bayes.fit_steps import (
    cells_for_sampling,
    check_parametrisation,
    check_run_options,
    pointwise_unit,
    sample_and_check,
    sampler_start,
    sampling_model,
    subject_start,
)
from stopwise.estimation.bayes.initial import (
    initial_natural,
)
from stopwise.estimation.bayes.loo_compare import loo_compare
from stopwise.estimation.bayes.pooled_start import (
    PooledStart,
    ml_start,
)
from stopwise.estimation.bayes.posterior import Posterior
from stopwise.estimation.bayes.prepare import (
    as_bundle,
    as_model,
)
from stopwise.estimation.bayes.sampler import (
    choose_chain_method,
    release_compiled_programs,
)
from stopwise.estimation.bayes.subject_start import (
    describe_parametrisation,
)
from stopwise.estimation.bayes.support import sample_below_cliff
from stopwise.estimation.bayes.truncation import (
    check_passed,
)
from stopwise.estimation.point_fits import PointFits
from stopwise.models.base import Model

# ---------------------------------------------------------------------------------------
# Public entry point.


def fit_bayes(
    model: Model | str,
    data: Any,
    *,
    hierarchical: bool = False,
    chains: int = 4,
    draws: int = 1000,
    warmup: int = 1000,
    seed: int = 0,
    priors: Mapping[str, Any] | None = None,
    formulas: Sequence[str] | Mapping[str, str] | None = None,
    init: Any = None,
    progress: bool = True,
    target_accept: float = 0.8,
    max_tree_depth: int = 10,
    chain_method: str = "auto",
    parametrisation: str = "auto",
    dense_mass: bool | None = None,
    whiten_subjects: bool = False,
    hdi_prob: float = 0.95,
    pointwise: str | None = None,
    loo: str | None = None,
    loo_refits: bool = True,
    aggregate: bool = True,
    planner_cap: str = "auto",
    se: Any = None,
    by: Any = None,
    point_fits: PointFits | None = None,
    **ignored: Any,
) -> Any:
    """Posterior of ``model`` given ``data`` by NUTS (see the module docstring).

    init: None (pooled: the ML estimate and covariance, estimation/bayes/pooled_start.py;
    hierarchical: see below), "start" (model start values), "mle" or a mapping name ->
    natural value; chains start near it with a small jitter.
    Hierarchical fits start every subject near its own ML estimate and the population sd at
    the subjects' spread; with init=None the population location starts at the subjects'
    median (estimation/bayes/subject_start.py), otherwise at the values ``init`` names.
    point_fits: the ML fits those starts come from (estimation/point_fits.py; the Bayes wing
    never imports the ML wing): stopwise.estimation.ml.point_fits.ML_POINT_FITS, which
    ``stopwise.fit`` passes; a start that needs them without them is refused.
    parametrisation: hierarchical only; "auto" (the documented rule), "centred" or
    "noncentred". dense_mass: a dense mass matrix for the population sites (default: on for
    hierarchical fits, off for pooled ones). whiten_subjects: hierarchical only, off by
    default; sample each subject's sites through the fixed affine map of
    estimation/bayes/whiten.py (same posterior). Measured on the 120 demo subjects
    (crra+planner+logit, 2 x 600 after 400, 2026-12-02): 21 leapfrog steps per draw instead
    of 31, but min bulk ESS 203 instead of 690 (precision's between-subject sd mixes worse).
    loo (alias ``pointwise``): unit of the ArviZ log-likelihood and of LOO: "subject"
    (default with several subjects: leave-one-subject-out, Pareto k > 0.7 repaired by refits
    when ``loo_refits``, estimation/bayes/loo_subject.py), "trial" (stopping) or "row".
    planner_cap: for a planner model without ``max_target``, "auto" samples with the cap
    horizon + 30 and checks it at 100 posterior draws against the default cap, refitting at
    the default cap if the check fails; "exact" uses the default cap
    (estimation/bayes/truncation.py). Returns a
    :class:`stopwise.estimation.bayes.posterior.Posterior`.
    """
    arguments = {k: v for k, v in locals().items() if k != "ignored"}
    check_run_options(se, by, ignored, chains, draws, warmup, hdi_prob, planner_cap)
    notes: list[str] = []
    exact_model = as_model(model)
    data = as_bundle(data)
    model, capped = sampling_model(exact_model, data, planner_cap, notes)
    model, cliff_note = sample_below_cliff(  # issue 16 item 2: r < 1 where data rule out r >= 1
        model, data, hierarchical=hierarchical, formulas=formulas, priors=priors
    )
    notes += [cliff_note] if cliff_note else []
    unit = pointwise_unit(loo if loo is not None else pointwise, data)
    check_parametrisation(parametrisation)
    from_ml = pooled_from_ml(hierarchical, init)
    pooled = ml_start(model, data, formulas, point_fits) if from_ml else None
    notes += pooled.notes if pooled else []
    start_at = pooled.natural if pooled else init
    natural = initial_natural(model, data, start_at, formulas, notes, point_fits)
    t_start = time.perf_counter()
    subjects, form = subject_start(
        model, data, hierarchical, init, natural, parametrisation, notes, point_fits, formulas
    )
    setup, args, cells, unit_labels, unit_name = cells_for_sampling(
        model, data, hierarchical, formulas, priors, unit, aggregate, form, notes
    )
    start_seconds = time.perf_counter() - t_start
    start = sampler_start(
        setup, args, natural, pooled, subjects, hierarchical, dense_mass, whiten_subjects
    )
    notes += start.notes
    method = choose_chain_method(chain_method, chains)
    run = sample_and_check(
        setup,
        args,
        data,
        start,
        n_units=len(unit_labels),
        chains=chains,
        draws=draws,
        warmup=warmup,
        seed=seed,
        progress=progress,
        target_accept=target_accept,
        max_tree_depth=max_tree_depth,
        chain_method=method,
    )
    if capped and not check_passed(run.truncation):
        return refit_at_default_cap(arguments, exact_model, model, run.truncation)
    post = build_posterior(
        setup=setup,
        data=data,
        args=args,
        cells=cells,
        samples=run.samples,
        extra=run.extra,
        pointwise_ll=run.pointwise_ll,
        unit_labels=unit_labels,
        unit_name=unit_name,
        run={
            "chains": chains,
            "draws": draws,
            "warmup": warmup,
            "seed": seed,
            "chain_method": method,
            "target_accept": target_accept,
            "max_tree_depth": max_tree_depth,
            "init": start.origin or _init_text(init, pooled),
            "parametrisation": describe_parametrisation(setup.names, form) if form else None,
            "dense_mass": start.dense_mass,
            "subject_whitening": start.whitening is not None,
            "start_seconds": start_seconds,
            "sampling_seconds": run.sampling_seconds,
            "pointwise_seconds": run.pointwise_seconds,
            "planner_cap": planner_cap,
            "truncation_check": run.truncation,
            "truncation_seconds": run.truncation_seconds,
            "formulas": _formula_list(formulas),
        },
        hdi_prob=hdi_prob,
        notes=notes,
    )
    release_compiled_programs()
    if unit_name == "subject" and loo_refits:
        finish_subject_loo(post, arguments)
    return post


def refit_at_default_cap(
    arguments: Mapping[str, Any], exact_model: Model, capped: Model, truncation: Any
) -> Any:
    """The same fit at the default planner cap, after the automatic cap failed its check."""
    release_compiled_programs()
    exact = fit_bayes(**{**arguments, "model": exact_model, "planner_cap": "exact"})
    exact.notes.insert(
        0,
        f"the automatic planner cap max_target={capped.options['max_target']} changed the "
        f"log-likelihood by up to {truncation['max_abs_loglik_difference']:.2g} at "
        "posterior draws: refitted at the default cap",
    )
    return exact


def finish_subject_loo(post: Any, arguments: Mapping[str, Any]) -> None:
    """Converged fits: repair leave-one-subject-out terms with Pareto k > 0.7 by refits;
    unconverged fits with such terms get a note instead."""
    if post.converged:
        repair_subject_loo(post, arguments)
    elif post.loo_summary()["n_pareto_k_above_0.7"]:
        post.notes.append(
            "leave-one-subject-out: subjects with Pareto k > 0.7 were not refitted because "
            "the fit did not converge; its elpd is not trustworthy"
        )


def repair_subject_loo(post: Any, arguments: Mapping[str, Any]) -> None:
    """Leave-one-subject-out terms with Pareto k > 0.7 replaced by refits of the same fit
    without those subjects (estimation/bayes/loo_subject.py); the result is stored on ``post``."""
    psis = post.loo()

    def refit(data: Any, seed: int) -> Any:
        again = {**arguments, "data": data, "seed": seed, "progress": False}
        return fit_bayes(**{**again, "loo_refits": False})

    result = loo_subject.repair(
        post,
        np.asarray(psis["loo_i"].values),
        np.asarray(psis["pareto_k"].values),
        refit,
        has_formulas=bool(arguments.get("formulas")),
    )
    post.loo_repair = result
    post._loo = loo_subject.corrected_elpd(psis, result)
    post.notes.extend(result.notes)


def pooled_from_ml(hierarchical: bool, init: Any) -> bool:
    """Pooled fits with init None or "mle" start at the ML estimate
    (estimation/bayes/pooled_start.py)."""
    return not hierarchical and (init is None or (isinstance(init, str) and init == "mle"))


def _init_text(init: Any, pooled: PooledStart | None = None) -> str:
    if pooled is not None:
        return "ML estimate" if pooled.coef is not None else "model start values"
    if isinstance(init, Mapping):
        return "user values"
    return "model start values" if init in (None, "start") else str(init)


def _formula_list(formulas: Any) -> list[str]:
    if not formulas:
        return []
    if isinstance(formulas, Mapping):
        return [f"{k} ~ {v}" for k, v in formulas.items()]
    return list(formulas)


def compare_bayes(
    models: Sequence[Any], data: Any = None, *, names: Sequence[str] | None = None, **kw: Any
) -> Any:
    """Rank models by PSIS-LOO expected log predictive density (ArviZ), see
    :func:`stopwise.estimation.bayes.loo_compare.loo_compare`. ``models`` may hold fitted
    Posterior objects or models/specs, which are fitted here with ``fit_bayes(**kw)``."""
    fits = []
    for m in models:
        if isinstance(m, Posterior):
            fits.append(m)
        else:
            if data is None:
                raise StopwiseInputError("compare_bayes: data are needed to fit unfitted models")
            fits.append(fit_bayes(m, data, **kw))
    return loo_compare(fits, names=names)
