"""The steps of a Bayesian fit, in the order ``fit_bayes`` (estimation/bayes/fit.py) runs
them: check the options, choose the model the sampler runs and the pointwise unit, start the
subjects, put the data in cells, set the sampler's start, then sample and check.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from dataclasses import dataclass, replace
from functools import partial
from typing import Any

import numpy as np

from stopwise.data_schemas.arrays import StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.density import (
    CellArgs,
    Setup,
    pooled_log_prior,
    population_sites,
)
from stopwise.estimation.bayes.initial import (
    CONTEST_HIERARCHY_COST,
    hierarchical_start,
    hierarchical_values,
    initial_inverse_mass,
    initial_values,
    jitter_scales,
)
from stopwise.estimation.bayes.laplace_mode import flat_sizes, prior_terms
from stopwise.estimation.bayes.mode_start import checked_pooled_start
from stopwise.estimation.bayes.pooled_start import (
    PooledStart,
    start_sites,
)
from stopwise.estimation.bayes.prepare import (
    aggregation_is_exact,
    check_kind,
    prepare,
)
from stopwise.estimation.bayes.sampler import (
    draws_pointwise,
    run_nuts,
)
from stopwise.estimation.bayes.subject_start import (
    PARAMETRISATIONS,
    SubjectStart,
    choose_parametrisation,
)
from stopwise.estimation.bayes.truncation import (
    PLANNER_CAPS,
    auto_capped,
    truncation_check,
)
from stopwise.estimation.bayes.whiten import (
    WHITE_SITE,
    SubjectWhitening,
    build_whitening,
    subject_site_names,
    unwhiten_samples,
    white_from_sites,
)
from stopwise.estimation.loss_side import data_has_losses, loss_parameters
from stopwise.estimation.point_fits import PointFits
from stopwise.models.base import Model


def check_run_options(
    se: Any,
    by: Any,
    ignored: Mapping[str, Any],
    chains: int,
    draws: int,
    warmup: int,
    hdi_prob: float,
    planner_cap: str,
) -> None:
    """Refuse options that do not apply to a Bayesian fit and values out of range."""
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


def sampling_model(
    model: Model, data: Any, planner_cap: str, notes: list[str]
) -> tuple[Model, bool]:
    """The model the sampler runs: with planner_cap="auto", a planner model capped at the
    data horizon + 30 (checked after sampling, estimation/bayes/truncation.py), else
    ``model``; its static parts sized from the data and its kind checked against them.
    The flag tells whether the automatic cap was applied."""
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
    return model, capped is not None


def pointwise_unit(pointwise: str | None, data: Any) -> str:
    """The unit of the pointwise log-likelihood: the caller's choice ("trial" means "row"
    for lottery data), else "subject" with several subjects, else "trial" (stopping) or
    "row" (lottery)."""
    if pointwise == "trial" and not isinstance(data, StoppingData):
        pointwise = "row"  # a lottery choice is its own trial
    if pointwise is None:
        several = data.n_subjects > 1
        pointwise = "subject" if several else "trial" if isinstance(data, StoppingData) else "row"
    return pointwise


def check_parametrisation(parametrisation: str) -> None:
    if parametrisation not in PARAMETRISATIONS:
        raise StopwiseInputError(
            f"parametrisation={parametrisation!r}: expected one of {', '.join(PARAMETRISATIONS)}"
        )


def subject_start(
    model: Model,
    data: Any,
    hierarchical: bool,
    init: Any,
    natural: Mapping[str, float],
    parametrisation: str,
    notes: list[str],
    point_fits: PointFits | None,
    formulas: Any = None,
) -> tuple[SubjectStart | None, tuple[bool, ...]]:
    """Hierarchical fits: the subjects' start (estimation/bayes/initial.py) and the
    centred / non-centred choice per parameter; pooled fits: (None, ()). Loss-side
    parameters of gains-only data (estimation/loss_side.py) start from their prior and are
    sampled non-centred, as the pooled fit does (estimation/bayes/pooled_start.py)."""
    if not hierarchical:
        return None, ()
    if model.data_kind == "contest":
        notes.append(CONTEST_HIERARCHY_COST)
    mu = None if init is None else natural
    absent = () if formulas or data_has_losses(model, data) else loss_parameters(model)
    if absent:
        notes.append(NOT_IDENTIFIED.format(names=", ".join(absent)))
    start = hierarchical_start(model, data, mu, notes, point_fits, absent)
    form = choose_parametrisation(parametrisation, start, data.n_obs / data.n_subjects)
    return start, form


def cells_for_sampling(
    model: Model,
    data: Any,
    hierarchical: bool,
    formulas: Any,
    priors: Mapping[str, Any] | None,
    unit: str,
    aggregate: bool,
    form: tuple[bool, ...],
    notes: list[str],
) -> tuple[Setup, CellArgs, Any, np.ndarray, str]:
    """The data in cells (estimation/bayes/prepare.py), distinct rows aggregated unless the
    model is a contest model or aggregation does not reproduce the plain row sum."""
    aggregate = model.data_kind != "contest" and aggregate
    prepared = prepare(
        model,
        data,
        hierarchical=hierarchical,
        formulas=formulas,
        priors=priors,
        pointwise=unit,
        aggregate=aggregate,
        centred=form,
    )
    setup, args = prepared[0], prepared[1]
    if aggregate and not aggregation_is_exact(model, data, args, setup):
        notes.append(
            "rows were not aggregated: the model's row log-likelihoods depend on more "
            "than the row's own fields"
        )
        prepared = prepare(
            model,
            data,
            hierarchical=hierarchical,
            formulas=formulas,
            priors=priors,
            pointwise=unit,
            aggregate=False,
            centred=form,
        )
    return prepared


NOT_IDENTIFIED = (
    "not identified by these data: {names} (no outcome lies below the reference point, so "
    "they never enter the likelihood); their posterior, population and subject level, is "
    "their prior (their rows in the table show the prior, not evidence)"
)
WHITE_JITTER = 0.1  # start jitter of w: a tenth of a posterior sd per coordinate


@dataclass(frozen=True)
class SamplerStart:
    """Initial site values, their jitter scales, the initial inverse mass matrix (adapted in
    the warm-up, estimation/bayes/sampler.py) and whether the population block is dense."""

    values: Mapping[str, Any]
    scales: Mapping[str, Any] | None
    inverse_mass: Mapping[tuple[str, ...], Any] | None
    dense_mass: bool
    whitening: SubjectWhitening | None = None  # hierarchical: subject sites drawn as w
    origin: str | None = None  # pooled, checked start: what it is (estimation/bayes/mode_start.py)
    notes: tuple[str, ...] = ()  # a refused start and its replacement


def sampler_start(
    setup: Setup,
    args: CellArgs,
    natural: Mapping[str, float],
    pooled: PooledStart | None,
    subjects: SubjectStart | None,
    hierarchical: bool,
    dense_mass: bool | None,
    whiten: bool = False,
) -> SamplerStart:
    """Pooled ML start: the mode of the Laplace posterior and its covariance as a dense
    inverse mass matrix to start the warm-up's adaptation (estimation/bayes/pooled_start.py); hierarchical: the
    subjects' start (estimation/bayes/initial.py), with the subject sites whitened when
    ``whiten`` (estimation/bayes/whiten.py); else the natural start values."""
    values = initial_values(setup, natural)
    scales = inverse_mass = origin = None
    notes: tuple[str, ...] = ()
    if pooled is not None and pooled.coef is not None:
        values, scales = start_sites(pooled, setup.names, setup.coef_names)
        if pooled.has_curvature:
            sites = population_sites(setup)
            prior = prior_terms(partial(pooled_log_prior, setup), sites, flat_sizes(sites, values))
            checked = checked_pooled_start(setup, args, pooled, prior)
            values, scales, inverse_mass = checked.values, checked.scales, checked.inverse_mass
            origin, notes = checked.origin, checked.notes
            if inverse_mass is not None:
                dense_mass = True if dense_mass is None else dense_mass
    if dense_mass is None:
        dense_mass = hierarchical
    if subjects is not None:
        values = hierarchical_values(setup, subjects, values)
        scales = jitter_scales(setup, subjects)
        inverse_mass = initial_inverse_mass(setup, subjects, args, bool(dense_mass))
    start = SamplerStart(
        values=values,
        scales=scales,
        inverse_mass=inverse_mass,
        dense_mass=bool(dense_mass),
        origin=origin,
        notes=notes,
    )
    if subjects is not None and whiten:
        return whitened_start(setup, subjects, start)
    return start


def whitened_start(setup: Setup, subjects: SubjectStart, start: SamplerStart) -> SamplerStart:
    """The same start with the subject sites replaced by w_subject (estimation/bayes/whiten.py):
    w = 0 at the start point, jitter WHITE_JITTER (in posterior sds), inverse mass 1."""
    sites = subject_site_names(
        setup.names, tuple(setup.is_centred(j) for j in range(len(setup.names)))
    )
    x0 = np.stack([np.asarray(start.values[s], np.float64) for s in sites], axis=1)
    whitening = build_whitening(
        x0,
        subjects.subject_cov,
        subjects.sd,
        tuple(setup.is_centred(j) for j in range(len(setup.names))),
    )
    values = {k: v for k, v in start.values.items() if k not in sites}
    values[WHITE_SITE] = white_from_sites(x0, whitening)
    scales = {k: v for k, v in (start.scales or {}).items() if k not in sites}
    scales[WHITE_SITE] = WHITE_JITTER
    inverse = {k: v for k, v in (start.inverse_mass or {}).items() if k[0] not in sites}
    inverse[(WHITE_SITE,)] = np.ones(x0.size)
    return replace(start, values=values, scales=scales, inverse_mass=inverse, whitening=whitening)


@dataclass(frozen=True)
class SampledRun:
    """Draws by chain, NUTS's extra fields, the pointwise log-likelihood per unit, the
    planner-cap check and the seconds each took."""

    samples: dict[str, np.ndarray]
    extra: Mapping[str, Any]
    pointwise_ll: np.ndarray
    truncation: Any
    sampling_seconds: float
    pointwise_seconds: float
    truncation_seconds: float


def sample_and_check(
    setup: Setup,
    args: CellArgs,
    data: Any,
    start: SamplerStart,
    *,
    n_units: int,
    chains: int,
    draws: int,
    warmup: int,
    seed: int,
    progress: bool,
    target_accept: float,
    max_tree_depth: int,
    chain_method: str,
) -> SampledRun:
    """Run NUTS (estimation/bayes/sampler.py), then the pointwise log-likelihood and the
    planner-cap check at the draws (estimation/bayes/truncation.py)."""
    t0 = time.perf_counter()
    run_setup, run_args = setup, args
    if start.whitening is not None:
        run_setup = replace(setup, whitened=True)
        run_args = replace(args, whitening=start.whitening)
    mcmc = run_nuts(
        run_setup,
        run_args,
        chains=chains,
        draws=draws,
        warmup=warmup,
        seed=seed,
        init_values=start.values,
        init_scales=start.scales,
        progress=progress,
        target_accept=target_accept,
        max_tree_depth=max_tree_depth,
        chain_method=chain_method,
        dense_mass=start.dense_mass,
        inverse_mass=start.inverse_mass,
    )
    # plain numpy: slicing device arrays draw-chunk by draw-chunk is ~100x slower; the
    # conversion also waits for chains that run asynchronously (pmap), so time after it
    samples = {k: np.asarray(v) for k, v in mcmc.get_samples(group_by_chain=True).items()}
    if start.whitening is not None:
        centred = tuple(setup.is_centred(j) for j in range(len(setup.names)))
        sites = subject_site_names(setup.names, centred)
        samples = unwhiten_samples(samples, start.whitening, sites)
    elapsed = time.perf_counter() - t0
    t1 = time.perf_counter()
    pointwise_ll = draws_pointwise(setup, samples, args, n_units)
    pointwise_seconds = time.perf_counter() - t1
    t2 = time.perf_counter()
    truncation = truncation_check(setup, args, data, samples)
    truncation_seconds = time.perf_counter() - t2
    return SampledRun(
        samples=samples,
        extra=mcmc.get_extra_fields(group_by_chain=True),
        pointwise_ll=pointwise_ll,
        truncation=truncation,
        sampling_seconds=elapsed,
        pointwise_seconds=pointwise_seconds,
        truncation_seconds=truncation_seconds,
    )


def _check_counts(**counts: int) -> None:
    for name, value in counts.items():
        if not isinstance(value, (int, np.integer)) or value < 1:
            raise StopwiseInputError(f"{name}={value!r}: expected a positive whole number")
