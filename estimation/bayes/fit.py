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
from functools import partial
from typing import Any

import numpy as np

from stopwise.data_schemas.arrays import StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes import loo_subject
from stopwise.estimation.bayes.density import (
    pooled_log_prior,
    population_sites,
)
from stopwise.estimation.bayes.initial import (
    CONTEST_HIERARCHY_COST,
    hierarchical_start,
    hierarchical_values,
    initial_inverse_mass,
    initial_natural,
    initial_values,
    jitter_scales,
)
from stopwise.estimation.bayes.pooled_start import (
    PooledStart,
    ml_start,
    prior_precision,
    start_inverse_mass,
    start_sites,
)
from stopwise.estimation.bayes.prepare import (
    aggregation_is_exact,
    as_bundle,
    as_model,
    check_kind,
    prepare,
)
from stopwise.estimation.bayes.sampler import (
    choose_chain_method,
    draws_pointwise,
    release_compiled_programs,
    run_nuts,
)
from stopwise.estimation.bayes.subject_start import (
    PARAMETRISATIONS,
    choose_parametrisation,
    describe_parametrisation,
)
from stopwise.estimation.bayes.truncation import (
    PLANNER_CAPS,
    auto_capped,
    check_passed,
    truncation_check,
)
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
    hdi_prob: float = 0.95,
    pointwise: str | None = None,
    loo: str | None = None,
    loo_refits: bool = True,
    aggregate: bool = True,
    planner_cap: str = "auto",
    se: Any = None,
    by: Any = None,
    **ignored: Any,
) -> Any:
    """Posterior of ``model`` given ``data`` by NUTS (see the module docstring).

    init: None (pooled: the ML estimate and covariance, estimation/bayes_pooled.py;
    hierarchical: see below), "start" (model start values), "mle" or a mapping name ->
    natural value; chains start near it with a small jitter.
    Hierarchical fits start every subject near its own ML estimate and the population sd at
    the subjects' spread; with init=None the population location starts at the subjects'
    median (estimation/bayes_start.py), otherwise at the values ``init`` names.
    parametrisation: hierarchical only; "auto" (the documented rule), "centred" or
    "noncentred". dense_mass: a dense mass matrix for the population sites (default: on for
    hierarchical fits, off for pooled ones).
    loo (alias ``pointwise``): unit of the ArviZ log-likelihood and of LOO: "subject"
    (default with several subjects: leave-one-subject-out, Pareto k > 0.7 repaired by refits
    when ``loo_refits``, estimation/loo_subject.py), "trial" (stopping) or "row". planner_cap: for a planner model without ``max_target``,
    "auto" samples with the cap horizon + 30 and checks it at 100 posterior draws against the
    default cap, refitting at the default cap if the check fails; "exact" uses the default
    cap (estimation/truncation.py). Returns a
    :class:`stopwise.estimation.posterior.Posterior`.
    """
    from stopwise.estimation.bayes.assemble import build_posterior

    arguments = {k: v for k, v in locals().items() if k not in ("ignored", "build_posterior")}

    if se not in (None, "posterior") or by is not None:
        raise StopwiseInputError(
            "Bayesian fits report posterior sds and HDIs: --se and --by do not apply "
            "(use hierarchical=True for subject-level parameters)"
        )
    unknown = sorted(k for k, v in ignored.items() if v is not None)
    if unknown:
        raise StopwiseInputError(f"Bayesian fit: unknown option(s) {unknown}")
    _check_counts(chains=chains, draws=draws, warmup=warmup)
    if not 0.0 < hdi_prob < 1.0:
        raise StopwiseInputError(f"hdi_prob={hdi_prob}: expected a number in (0, 1)")
    if planner_cap not in PLANNER_CAPS:
        raise StopwiseInputError(
            f"planner_cap={planner_cap!r}: expected one of {', '.join(PLANNER_CAPS)}"
        )
    model = as_model(model)
    data = as_bundle(data)
    notes: list[str] = []
    exact_model = model
    capped = auto_capped(model, data) if planner_cap == "auto" else None
    if capped is not None:
        model = capped
        notes.append(
            f"planner cap: max_target={model.options['max_target']} (data horizon "
            f"{data.horizon} + {model.options['max_target'] - data.horizon}), checked against "
            "the default cap at posterior draws (planner_cap='exact' samples at the default cap)"
        )
    size_from_data = (model.options or {}).get("prepare")
    if callable(size_from_data):  # size static parts (caps) from concrete data before tracing
        size_from_data(data)
    check_kind(model, data)
    pointwise = loo if loo is not None else pointwise
    if pointwise == "trial" and not isinstance(data, StoppingData):
        pointwise = "row"  # a lottery choice is its own trial
    if pointwise is None:
        several = data.n_subjects > 1
        pointwise = "subject" if several else "trial" if isinstance(data, StoppingData) else "row"
    if parametrisation not in PARAMETRISATIONS:
        raise StopwiseInputError(
            f"parametrisation={parametrisation!r}: expected one of {', '.join(PARAMETRISATIONS)}"
        )
    pooled = ml_start(model, data, formulas) if pooled_from_ml(hierarchical, init) else None
    notes += pooled.notes if pooled else []
    natural = initial_natural(model, data, pooled.natural if pooled else init, formulas, notes)
    start, form = None, ()
    t_start = time.perf_counter()
    if hierarchical:
        if model.data_kind == "contest":
            notes.append(CONTEST_HIERARCHY_COST)
        start = hierarchical_start(model, data, None if init is None else natural, notes)
        form = choose_parametrisation(parametrisation, start, data.n_obs / data.n_subjects)
    aggregate = model.data_kind != "contest" and aggregate
    setup, args, cells, unit_labels, unit_name = prepare(
        model,
        data,
        hierarchical=hierarchical,
        formulas=formulas,
        priors=priors,
        pointwise=pointwise,
        aggregate=aggregate,
        centred=form,
    )
    if aggregate and not aggregation_is_exact(model, data, args, setup):
        notes.append(
            "rows were not aggregated: the model's row log-likelihoods depend on more "
            "than the row's own fields"
        )
        setup, args, cells, unit_labels, unit_name = prepare(
            model,
            data,
            hierarchical=hierarchical,
            formulas=formulas,
            priors=priors,
            pointwise=pointwise,
            aggregate=False,
            centred=form,
        )
    start_seconds = time.perf_counter() - t_start
    values = initial_values(setup, natural)
    scales = inverse_mass = None
    if pooled is not None and pooled.coef is not None:
        values, scales = start_sites(pooled, setup.names, setup.coef_names)
        if pooled.cov is not None:
            sites = population_sites(setup)
            precision = prior_precision(partial(pooled_log_prior, setup), sites, values)
            inverse_mass = start_inverse_mass(
                pooled, setup.names, setup.coef_names, sites, precision
            )
            dense_mass = True if dense_mass is None else dense_mass
    if dense_mass is None:
        dense_mass = hierarchical
    if start is not None:
        values = hierarchical_values(setup, start, values)
        scales = jitter_scales(setup, start)
        inverse_mass = initial_inverse_mass(setup, start, args, bool(dense_mass))
    method = choose_chain_method(chain_method, chains)
    t0 = time.perf_counter()
    mcmc = run_nuts(
        setup,
        args,
        chains=chains,
        draws=draws,
        warmup=warmup,
        seed=seed,
        init_values=values,
        init_scales=scales,
        progress=progress,
        target_accept=target_accept,
        max_tree_depth=max_tree_depth,
        chain_method=method,
        dense_mass=bool(dense_mass),
        inverse_mass=inverse_mass,
        adapt_mass=not (pooled is not None and pooled.cov is not None),
    )
    # plain numpy: slicing device arrays draw-chunk by draw-chunk is ~100x slower; the
    # conversion also waits for chains that run asynchronously (pmap), so time after it
    samples = {k: np.asarray(v) for k, v in mcmc.get_samples(group_by_chain=True).items()}
    elapsed = time.perf_counter() - t0
    t1 = time.perf_counter()
    pointwise_ll = draws_pointwise(setup, samples, args, len(unit_labels))
    pointwise_seconds = time.perf_counter() - t1
    t2 = time.perf_counter()
    truncation = truncation_check(setup, args, data, samples)
    truncation_seconds = time.perf_counter() - t2
    if capped is not None and not check_passed(truncation):
        release_compiled_programs()
        exact = fit_bayes(**{**arguments, "model": exact_model, "planner_cap": "exact"})
        exact.notes.insert(
            0,
            f"the automatic planner cap max_target={model.options['max_target']} changed the "
            f"log-likelihood by up to {truncation['max_abs_loglik_difference']:.2g} at "
            "posterior draws: refitted at the default cap",
        )
        return exact
    post = build_posterior(
        setup=setup,
        data=data,
        args=args,
        cells=cells,
        samples=samples,
        extra=mcmc.get_extra_fields(group_by_chain=True),
        pointwise_ll=pointwise_ll,
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
            "init": _init_text(init, pooled),
            "parametrisation": describe_parametrisation(setup.names, form) if form else None,
            "dense_mass": bool(dense_mass),
            "start_seconds": start_seconds,
            "sampling_seconds": elapsed,
            "pointwise_seconds": pointwise_seconds,
            "planner_cap": planner_cap,
            "truncation_check": truncation,
            "truncation_seconds": truncation_seconds,
            "formulas": _formula_list(formulas),
        },
        hdi_prob=hdi_prob,
        notes=notes,
    )
    release_compiled_programs()
    if unit_name == "subject" and loo_refits:
        if post.converged:
            repair_subject_loo(post, arguments)
        elif post.loo_summary()["n_pareto_k_above_0.7"]:
            post.notes.append(
                "leave-one-subject-out: subjects with Pareto k > 0.7 were not refitted because "
                "the fit did not converge; its elpd is not trustworthy"
            )
    return post


def repair_subject_loo(post: Any, arguments: Mapping[str, Any]) -> None:
    """Leave-one-subject-out terms with Pareto k > 0.7 replaced by refits of the same fit
    without those subjects (estimation/loo_subject.py); the result is stored on ``post``."""
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


def _check_counts(**counts: int) -> None:
    for name, value in counts.items():
        if not isinstance(value, (int, np.integer)) or value < 1:
            raise StopwiseInputError(f"{name}={value!r}: expected a positive whole number")


def pooled_from_ml(hierarchical: bool, init: Any) -> bool:
    """Pooled fits with init None or "mle" start at the ML estimate (estimation/bayes_pooled.py)."""
    return not hierarchical and (init is None or (isinstance(init, str) and init == "mle"))


def _init_text(init: Any, pooled: PooledStart | None = None) -> str:
    if pooled is not None:
        if pooled.cov is not None:
            return "ML estimate, inverse mass matrix from the ML covariance"
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
    :func:`stopwise.estimation.posterior.loo_compare`. ``models`` may hold fitted
    Posterior objects or models/specs, which are fitted here with ``fit_bayes(**kw)``."""
    from stopwise.estimation.bayes.loo_compare import loo_compare
    from stopwise.estimation.bayes.posterior import Posterior

    fits = []
    for m in models:
        if isinstance(m, Posterior):
            fits.append(m)
        else:
            if data is None:
                raise StopwiseInputError("compare_bayes: data are needed to fit unfitted models")
            fits.append(fit_bayes(m, data, **kw))
    return loo_compare(fits, names=names)
