"""Bayesian estimation with NumPyro's NUTS: any model's ``loglik_obs`` wrapped automatically.

Rows are grouped in cells (estimation/cells.py) that share one parameter vector; with k the
model's parameters on their unconstrained scale z (x = ParamSpec.to_natural(z)):

  pooled:        z_k[c] = X_k[c] @ b_k
  hierarchical:  z_k[c] = X_k[c] @ b_k + u[s(c), k],   u_s ~ MVN(0, diag(sd) Omega diag(sd)),
                 L L^T = Omega ~ LKJ(2),  sd_k ~ HalfNormal(1); with mu_k the intercept of
                 b_k (0 for a parameter without intercept), each parameter k is sampled
                 centred (site z_subject_<k> = mu_k + u_k) or non-centred (site eta_<k>),
                 by the rule in estimation/bayes_start.py (``parametrisation``); see
                 ``subject_offsets`` for the conditional (Cholesky-order) construction

where X_k is the patsy design of the formula ``k ~ rhs`` (a column of ones without one), s(c)
the subject of cell c, and the intercept of b_k carries the parameter's natural-scale prior
(estimation/priors.py) through the change of variables; other effects ~ Normal(0, 1). The
log-likelihood added to the joint density is

  sum_c sum_i w[c, i] * loglik_obs(theta_c, data_c)[i],    theta_c = to_natural(z[c]),

where the rows of a cell are its *distinct* rows (rows equal in every field the model reads
-- step, action, bust, condition, group; or the lottery item and choice -- are evaluated once)
and w[c, i] counts the data rows each stands for (0 on padding). Aggregation is checked at the
start values against the plain row sum and dropped if it does not reproduce it; contest
models are never aggregated.

Pooled fits (init None or "mle") start at the ML estimate with the Laplace covariance of the
posterior as a dense inverse mass matrix, kept through the warm-up while the step size adapts
(estimation/bayes_pooled.py). Hierarchical fits start near per-subject ML estimates (estimation/bayes_start.py) and use a
dense mass matrix for the population sites (intercepts, effects, sd_z, L_corr; ``dense_mass``)
and a diagonal one for the subject sites; the warm-up starts from an inverse mass matrix of
normal-approximation posterior variances built from the per-subject standard errors
(``initial_inverse_mass``) rather than the identity.

No sampler is written here: NumPyro's NUTS runs on the CPU. Chains (``chain_method``):
"auto" runs them "parallel" (one chain per device, pmap) when JAX sees at least as many CPU
devices as chains, otherwise "vectorized" (all chains batched through one compiled program on
one device). Why: ``import stopwise`` imports JAX and the data loaders create arrays, so by the
time a fit starts JAX's CPU backend exists and numpyro.set_host_device_count (which sets
XLA_FLAGS=--xla_force_host_platform_device_count) can no longer add devices; with the default
single device NumPyro's "parallel" would silently fall back to one chain after another. Users
who want parallel chains set XLA_FLAGS=--xla_force_host_platform_device_count=4 before
starting Python; the ``stopwise`` command line does this itself (one device per chain, at
least 4) unless XLA_FLAGS already sets a device count (stopwise/cli.py). "vectorized" costs
one dispatch per leapfrog step for all chains (cheap likelihoods gain most); since batched
chains wait for the longest trajectory, "sequential" can be faster for expensive likelihoods
with uneven tree depths (a documented option).

The pointwise log-likelihood for ArviZ is computed after sampling (vmapped over draws in
chunks), not stored during sampling, and is summed per *unit*: a trial for stopping data (the
trial is the observation a stop-step distribution describes), a choice row for lottery data.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist
import numpyro.infer.mcmc as numpyro_mcmc
import numpyro.util
from numpyro.distributions import constraints
from numpyro.infer import MCMC, NUTS

from stopwise.data_schemas.arrays import STOPPING_ROW_FIELDS, LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import loo_subject
from stopwise.estimation.bayes_pooled import (
    PooledStart,
    ml_start,
    prior_precision,
    start_inverse_mass,
    start_sites,
)
from stopwise.estimation.bayes_start import (
    PARAMETRISATIONS,
    SubjectStart,
    choose_parametrisation,
    describe_parametrisation,
    init_near,
    per_subject_estimates,
    start_variances,
    summarise_subject_fits,
)
from stopwise.estimation.bayes_support import sample_below_cliff  # issue 16 item 2
from stopwise.estimation.cells import Cells, split_into_cells
from stopwise.estimation.draws import flatten_chains, map_draws
from stopwise.estimation.priors import (
    COEF_SD,
    HYPER_SD_SCALE,
    LKJ_CONCENTRATION,
    Prior,
    resolve_priors,
)
from stopwise.estimation.truncation import (
    PLANNER_CAPS,
    auto_capped,
    check_passed,
    truncation_check,
)
from stopwise.models.base import Model, ParamSpec

# ---------------------------------------------------------------------------------------
# Static description of a fit (hashable by identity: a static argument of jitted functions).


@dataclass(frozen=True, eq=False)
class Setup:
    """Parameters, priors, formula columns and the pooled/hierarchical switch."""

    model: Model
    priors: Mapping[str, Prior]
    coef_names: Mapping[str, tuple[str, ...]]  # per parameter: design column names
    hierarchical: bool
    n_subjects: int
    centred: tuple[bool, ...] = ()  # hierarchical, per parameter: z_subject_<k> or eta_<k>

    def is_centred(self, k: int) -> bool:
        return bool(self.centred[k]) if k < len(self.centred) else False

    @property
    def names(self) -> tuple[str, ...]:
        return self.model.param_names

    @property
    def specs(self) -> tuple[ParamSpec, ...]:
        return self.model.params

    def has_intercept(self, name: str) -> bool:
        return "Intercept" in self.coef_names[name]

    def effect_columns(self, name: str) -> tuple[int, ...]:
        return tuple(j for j, c in enumerate(self.coef_names[name]) if c != "Intercept")


@dataclass(frozen=True)
class CellArgs:
    """Arrays the NumPyro model reads (a pytree, so new data of the same shape reuse code)."""

    data: Any  # cells-batched bundle of distinct rows, leading axis = cell
    weight: Any  # (n_cells, width) how many data rows each distinct row stands for; 0 = pad
    designs: Mapping[str, Any]  # name -> (n_cells, n_coef)
    cell_subject: Any  # (n_cells,) subject index of each cell
    row_cell: Any  # (n_obs,) cell of each original data row
    row_pos: Any  # (n_obs,) position of each original row's distinct row in its cell
    row_unit: Any  # (n_obs,) pointwise unit of each original row


jax.tree_util.register_pytree_node(
    CellArgs,
    lambda a: (
        (a.data, a.weight, dict(a.designs), a.cell_subject, a.row_cell, a.row_pos, a.row_unit),
        None,
    ),
    lambda _, c: CellArgs(*c),
)


# ---------------------------------------------------------------------------------------
# The model: site values -> per-cell unconstrained parameters -> log-likelihood.


def cell_z(setup: Setup, sites: Mapping[str, Any], args: CellArgs) -> dict[str, Any]:
    """z_k[c] = X_k[c] @ b_k (+ u[s(c), k] when hierarchical), one array (n_cells,) per k."""
    out: dict[str, Any] = {}
    offsets = subject_offsets(setup, sites) if setup.hierarchical else None
    for k, name in enumerate(setup.names):
        coef = coefficients(setup, sites, name)
        z = args.designs[name] @ coef
        if offsets is not None:
            z = z + offsets[args.cell_subject, k]
        out[name] = z
    return out


def coefficients(setup: Setup, sites: Mapping[str, Any], name: str) -> Any:
    """b_k in design-column order from the intercept site z_<k> and effect site b_<k>."""
    parts = []
    effects = setup.effect_columns(name)
    e = 0
    for column in setup.coef_names[name]:
        if column == "Intercept":
            parts.append(jnp.reshape(sites[f"z_{name}"], (1,)))
        else:
            parts.append(jnp.reshape(sites[f"b_{name}"][e], (1,)))
            e += 1
    assert e == len(effects)
    return jnp.concatenate(parts)


def population_location(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """mu, shape (K,): the intercept z_k of each parameter, 0 for one without intercept."""
    return jnp.stack(
        [
            jnp.asarray(sites[f"z_{n}"], jnp.float64) if setup.has_intercept(n) else jnp.zeros(())
            for n in setup.names
        ]
    )


def population_scale_tril(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """diag(sd) L, the Cholesky factor of the subjects' covariance diag(sd) Omega diag(sd)."""
    sd = sites["sd_z"]
    chol = sites["L_corr"] if len(setup.names) > 1 else jnp.ones((1, 1))
    return sd[:, None] * chol


def subject_offsets(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """u, shape (n_subjects, K), u_s ~ Normal(0, diag(sd) Omega diag(sd)), built in parameter
    order from T = diag(sd) L (lower triangular) and eta_s ~ Normal(0, I):

      m_k = sum_{j<k} T_kj eta_j,   c_k = T_kk   (u_k given eta_1..eta_{k-1} is N(m_k, c_k^2))
      non-centred k:  u_k = m_k + c_k eta_k                      (site eta_<k>)
      centred k:      u_k = z_subject_<k> - mu_k,  eta_k = (u_k - m_k) / c_k

    so u = eta T^T either way and each parameter may use either form."""
    tril = population_scale_tril(setup, sites)
    mu = population_location(setup, sites)
    etas: list[Any] = []
    offsets: list[Any] = []
    for k, name in enumerate(setup.names):
        mean = sum((tril[k, j] * etas[j] for j in range(k)), jnp.zeros(setup.n_subjects))
        if setup.is_centred(k):
            u = sites[f"z_subject_{name}"] - mu[k]
            eta = (u - mean) / tril[k, k]
        else:
            eta = sites[f"eta_{name}"]
            u = mean + tril[k, k] * eta
        etas.append(eta)
        offsets.append(u)
    return jnp.stack(offsets, axis=1)


def hierarchical_log_density(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """log HalfNormal(sd_z; 1) + log LKJCholesky(L; 2) + sum_s log N(u_s; 0, T T^T) in the
    sampled coordinates: sum_k sum_s [log N(eta_sk; 0, 1) - centred_k log c_k]
    (the change of variables eta_k -> z_subject_k for the centred parameters)."""
    k = len(setup.names)
    total = jnp.sum(dist.HalfNormal(HYPER_SD_SCALE).log_prob(sites["sd_z"]))
    if k > 1:
        total = total + dist.LKJCholesky(k, LKJ_CONCENTRATION).log_prob(sites["L_corr"])
    tril = population_scale_tril(setup, sites)
    u = subject_offsets(setup, sites)
    eta = jax.scipy.linalg.solve_triangular(tril, u.T, lower=True).T
    total = total + jnp.sum(dist.Normal(0.0, 1.0).log_prob(eta))
    centred = jnp.asarray([setup.is_centred(j) for j in range(k)], jnp.float64)
    return total - setup.n_subjects * jnp.sum(centred * jnp.log(jnp.diagonal(tril)))


jitted_hierarchical_log_density = jax.jit(hierarchical_log_density, static_argnums=0)


def cell_loglik(setup: Setup, sites: Mapping[str, Any], args: CellArgs) -> Any:
    """loglik_obs(theta_c, data_c)[i] of each distinct row, 0 on padding; (n_cells, width)."""
    z = cell_z(setup, sites, args)
    theta = {spec.name: spec.to_natural(z[spec.name]) for spec in setup.specs}
    ll = jax.vmap(setup.model.loglik_obs)(theta, args.data)
    return jnp.where(args.weight > 0, ll, 0.0)


def total_loglik(setup: Setup, sites: Mapping[str, Any], args: CellArgs) -> Any:
    """sum_c sum_i weight[c, i] * loglik_obs(theta_c, data_c)[i] (= the sum over data rows)."""
    return jnp.sum(args.weight * cell_loglik(setup, sites, args))


# One compiled call even when NumPyro runs the model eagerly (its set-up traces the model
# with concrete values, which would otherwise compile every primitive separately).
jitted_total_loglik = jax.jit(total_loglik, static_argnums=0)


def row_loglik(setup: Setup, sites: Mapping[str, Any], args: CellArgs) -> Any:
    """Log-likelihood of every original data row, shape (n_obs,)."""
    return cell_loglik(setup, sites, args)[args.row_cell, args.row_pos]


def numpyro_model(setup: Setup, args: CellArgs) -> None:
    """The joint density: priors (module docstring) plus the summed log-likelihood."""
    sites: dict[str, Any] = {}
    for spec in setup.specs:
        name = spec.name
        if setup.has_intercept(name):
            sites[f"z_{name}"] = numpyro.sample(
                f"z_{name}", dist.ImproperUniform(constraints.real, (), ())
            )
        n_eff = len(setup.effect_columns(name))
        if n_eff:
            sites[f"b_{name}"] = numpyro.sample(
                f"b_{name}", dist.Normal(0.0, COEF_SD).expand([n_eff]).to_event(1)
            )
    if setup.hierarchical:
        k = len(setup.names)
        # densities in one compiled factor (eager NumPyro start-up would compile every
        # primitive of them separately); the sites only carry supports
        sites["sd_z"] = numpyro.sample("sd_z", dist.ImproperUniform(constraints.positive, (), (k,)))
        if k > 1:
            sites["L_corr"] = numpyro.sample(
                "L_corr", dist.ImproperUniform(constraints.corr_cholesky, (), (k, k))
            )
        for j, name in enumerate(setup.names):
            site = f"z_subject_{name}" if setup.is_centred(j) else f"eta_{name}"
            sites[site] = numpyro.sample(
                site, dist.ImproperUniform(constraints.real, (), (setup.n_subjects,))
            )
        numpyro.factor("population", jitted_hierarchical_log_density(setup, sites))
    numpyro.factor("prior", jitted_intercept_prior(setup, sites))
    numpyro.factor("loglik", jitted_total_loglik(setup, sites, args))


def intercept_prior(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """sum_k log prior_k(to_natural(z_k)) + log |dx/dz| at the intercepts z_k."""
    total = jnp.zeros(())
    for spec in setup.specs:
        if setup.has_intercept(spec.name):
            prior = setup.priors[spec.name]
            total = total + prior.log_density_unconstrained(spec, sites[f"z_{spec.name}"])
    return total


jitted_intercept_prior = jax.jit(intercept_prior, static_argnums=0)


# ---------------------------------------------------------------------------------------
# Data preparation.


def as_bundle(data: Any) -> Any:
    """A StoppingData/LotteryData bundle from a bundle or a loaded Dataset (``.arrays()``)."""
    if isinstance(data, (StoppingData, LotteryData)):
        return data
    if hasattr(data, "arrays"):
        return data.arrays()
    raise StopwiseInputError(
        f"Bayesian fit: expected a StoppingData/LotteryData bundle or a loaded data set, "
        f"got {type(data).__name__}"
    )


def as_model(model: Model | str) -> Model:
    if isinstance(model, Model):
        return model
    if isinstance(model, str):
        from stopwise.models.spec import build_model

        return build_model(model)
    raise StopwiseInputError(f"expected a Model or a model spec string, got {type(model).__name__}")


def check_kind(model: Model, data: Any) -> None:
    want = LotteryData if model.data_kind == "lottery" else StoppingData
    if not isinstance(data, want):
        got = "lottery" if isinstance(data, LotteryData) else "stopping"
        raise StopwiseInputError(
            f"model {model.name} is a {model.data_kind} model but the data are {got} data"
        )


def unit_of_rows(data: Any, pointwise: str) -> tuple[np.ndarray, np.ndarray, str]:
    """Pointwise unit index per row (0..n_units-1), the unit labels and the unit name."""
    if pointwise == "row":
        n = data.n_obs
        return np.arange(n), np.arange(n), "row"
    if pointwise == "trial" and isinstance(data, StoppingData):
        labels, index = np.unique(np.asarray(data.trial), return_inverse=True)
        return index.reshape(-1), labels, "trial"
    if pointwise == "subject":
        labels, index = np.unique(np.asarray(data.subject), return_inverse=True)
        return index.reshape(-1), labels, "subject"
    raise StopwiseInputError(
        f"pointwise={pointwise!r}: expected 'row', 'subject' or (stopping data) 'trial'"
    )


ROW_SIGNATURE = {
    "stopping": ("step", "draw", "bust", "cond", "group"),
    "lottery": ("choice_b", "a_x", "a_p", "b_x", "b_p"),
}


def distinct_rows(data: Any, key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First index of each distinct (cell key, row fields) combination and, per row, the
    index of its distinct combination."""
    kind = "lottery" if isinstance(data, LotteryData) else "stopping"
    columns = [np.asarray(key, np.float64).reshape(len(key), 1)]
    for name in ROW_SIGNATURE[kind]:
        value = np.asarray(getattr(data, name), np.float64)
        columns.append(value.reshape(len(key), -1))
    _, first, inverse = np.unique(
        np.hstack(columns), axis=0, return_index=True, return_inverse=True
    )
    return first, inverse.reshape(-1)


def aggregation_is_exact(model: Model, data: Any, args: CellArgs, setup: Setup) -> bool:
    """Check at the start values that weighted distinct rows reproduce the row sum (a model
    whose rows depend on other rows, e.g. through the trial, would fail this)."""
    theta = model.start_theta()
    labels = ("trial_labels",) if isinstance(data, StoppingData) else ("item_labels",)
    plain = replace(data, covariates={}, subject_labels=None, **dict.fromkeys(labels))
    direct = float(jax.jit(lambda t, d: jnp.sum(model.loglik_obs(t, d)))(theta, plain))
    sites = {f"z_{s.name}": s.to_unconstrained(theta[s.name]) for s in setup.specs}
    sites.update({f"b_{n}": jnp.zeros(len(setup.effect_columns(n))) for n in setup.names})
    if setup.hierarchical:
        sites.update(zero_offset_sites(setup, sites))
    pooled = float(jitted_total_loglik(setup, sites, args))
    return math.isfinite(direct) and abs(direct - pooled) <= 1e-9 * max(1.0, abs(direct))


def zero_offset_sites(setup: Setup, sites: Mapping[str, Any]) -> dict[str, Any]:
    """Hierarchical sites that put every subject at the population location (u = 0)."""
    k = len(setup.names)
    out: dict[str, Any] = {"sd_z": jnp.ones(k), "L_corr": jnp.eye(k)}
    mu = population_location(setup, sites)
    for j, name in enumerate(setup.names):
        if setup.is_centred(j):
            out[f"z_subject_{name}"] = jnp.full(setup.n_subjects, mu[j])
        else:
            out[f"eta_{name}"] = jnp.zeros(setup.n_subjects)
    return out


def build_designs_for(model: Model, data: Any, formulas: Any) -> dict[str, Any]:
    """Per-row design matrices and column names for every parameter (ones without formula)."""
    from stopwise.estimation.formulas import build_designs

    n = data.n_obs
    parsed = build_designs(formulas, model.param_names, dict(data.covariates)) if formulas else {}
    out = {}
    for name in model.param_names:
        if name in parsed:
            out[name] = (parsed[name].design, parsed[name].columns)
        else:
            out[name] = (np.ones((n, 1)), ("Intercept",))
    return out


def prepare(
    model: Model,
    data: Any,
    *,
    hierarchical: bool,
    formulas: Any,
    priors: Mapping[str, Any] | None,
    pointwise: str,
    aggregate: bool = True,
    centred: Sequence[bool] = (),
) -> tuple[Setup, CellArgs, Cells, np.ndarray, str]:
    """Cells (subject x distinct design row when hierarchical, distinct design row when
    pooled), their designs and subjects, and the static setup. With ``aggregate``, rows that
    agree in every field the model reads (all but trial) and in their cell are evaluated
    once and weighted by their count."""
    designs = build_designs_for(model, data, formulas)
    data = replace(data, covariates={})  # the formulas have read them; models do not
    combined = np.concatenate([d for d, _ in designs.values()], axis=1)
    _, design_row = np.unique(combined, axis=0, return_inverse=True)
    design_row = design_row.reshape(-1)
    subject = np.asarray(data.subject).astype(np.int64)
    key = subject * (int(design_row.max()) + 1) + design_row if hierarchical else design_row
    if aggregate:
        first, inverse = distinct_rows(data, key)
    else:
        first, inverse = np.arange(data.n_obs), np.arange(data.n_obs)
    counts = np.bincount(inverse, minlength=len(first)).astype(np.float64)
    cells = split_into_cells(data.take(first), key[first])
    cell_of, pos_of = np.zeros(len(first), np.int64), np.zeros(len(first), np.int64)
    filled = cells.rows >= 0
    cell_of[cells.rows[filled]] = np.nonzero(filled)[0]
    pos_of[cells.rows[filled]] = np.nonzero(filled)[1]
    head = first[cells.rows[:, 0]]  # an original row of each cell
    unit_index, unit_labels, unit_name = unit_of_rows(data, pointwise)
    args = CellArgs(
        data=jax.tree_util.tree_map(jnp.asarray, cells.data),
        weight=jnp.asarray(np.where(filled, counts[np.maximum(cells.rows, 0)], 0.0)),
        designs={n: jnp.asarray(d[head]) for n, (d, _) in designs.items()},
        cell_subject=jnp.asarray(subject[head]),
        row_cell=jnp.asarray(cell_of[inverse]),
        row_pos=jnp.asarray(pos_of[inverse]),
        row_unit=jnp.asarray(unit_index),
    )
    setup = Setup(
        model=model,
        priors=resolve_priors(model, priors),
        coef_names={n: tuple(c) for n, (_, c) in designs.items()},
        hierarchical=hierarchical,
        n_subjects=int(data.n_subjects),
        centred=tuple(bool(c) for c in centred) if hierarchical else (),
    )
    return setup, args, cells, unit_labels, unit_name


def pad_cells(args: CellArgs, width: int) -> CellArgs:
    """The same cells padded (weight 0, copies of each cell's first row) to ``width`` rows,
    without the per-row maps: for re-running one compiled sampler on data sets of different
    sizes (simulation-based calibration)."""
    have = int(args.weight.shape[1])
    if width < have:
        raise ValueError(f"cannot pad {have} rows down to {width}")
    extra = width - have

    fields = (
        STOPPING_ROW_FIELDS
        if isinstance(args.data, StoppingData)
        else ("subject", "choice_b", "a_x", "a_p", "b_x", "b_p")
    )

    def widen(leaf: Any) -> Any:
        return jnp.concatenate([leaf, jnp.repeat(leaf[:, :1], extra, axis=1)], axis=1)

    data = replace(args.data, **{f: widen(jnp.asarray(getattr(args.data, f))) for f in fields})
    weight = jnp.concatenate([args.weight, jnp.zeros((args.weight.shape[0], extra))], axis=1)
    dummy = jnp.zeros(1, jnp.int32)
    return CellArgs(
        data=data,
        weight=weight,
        designs=args.designs,
        cell_subject=args.cell_subject,
        row_cell=dummy,
        row_pos=dummy,
        row_unit=dummy,
    )


# ---------------------------------------------------------------------------------------
# Initial values.


def initial_natural(
    model: Model, data: Any, init: Any, formulas: Any, notes: list[str]
) -> dict[str, float]:
    """Natural-scale starting values of every parameter: the model's start values, the ML
    estimate (init="mle"), or a user mapping name -> natural value (checked in bounds)."""
    natural = model.start_theta()
    if isinstance(init, Mapping):
        unknown = sorted(set(init) - set(model.param_names))
        if unknown:
            raise StopwiseInputError(
                f"init gives {unknown}, not parameters of {model.name} {list(model.param_names)}"
            )
        natural.update({k: float(v) for k, v in init.items()})
    elif init == "mle":
        natural.update(mle_estimates(model, data, formulas, notes))
    elif init not in (None, "start"):
        raise StopwiseInputError(f"init={init!r}: expected None, 'start', 'mle' or a mapping")
    for spec in model.params:
        x = float(natural[spec.name])
        if not spec.lower < x < spec.upper:
            raise StopwiseInputError(
                f"initial value {spec.name}={x:g} lies outside ({spec.lower:g}, {spec.upper:g})"
            )
    return {k: float(v) for k, v in natural.items()}


def initial_values(setup: Setup, natural: Mapping[str, float]) -> dict[str, Any]:
    """Unconstrained starting values z_k = to_unconstrained(x_k) of the intercept sites."""
    return {
        f"z_{spec.name}": float(spec.to_unconstrained(natural[spec.name]))
        for spec in setup.specs
        if setup.has_intercept(spec.name)
    }


CONTEST_HIERARCHY_COST = (
    "hierarchical contest model: every gradient solves one equilibrium per subject (measured "
    "on 16 demo subjects, crra+qre with max_target 30: 0.26 s per gradient against 16 ms "
    "pooled), so a full run can take hours; a pooled fit or a smaller max_target is much "
    "faster"
)


def hierarchical_start(
    model: Model, data: Any, mu_natural: Mapping[str, float] | None, notes: list[str]
) -> SubjectStart:
    """Population and subject starting values from per-subject ML fits
    (estimation/bayes_start.py); ``mu_natural`` (pooled ML or user values) replaces the
    median of the subjects as the population location when given. Contest models skip the
    per-subject fits: every subject starts at the pooled ML estimate (or ``mu_natural``)."""
    k = len(model.param_names)
    n = int(data.n_subjects)
    mu = None
    if mu_natural:
        mu = np.array([float(s.to_unconstrained(mu_natural[s.name])) for s in model.params])
    if model.data_kind == "contest":
        # one equilibrium per subject inside a per-subject Newton fit is far too slow for a
        # starting point (16 demo subjects: not done after 10 minutes); start every subject
        # at the pooled ML estimate instead
        if mu is None:
            pooled = {**model.start_theta(), **mle_estimates(model, data, None, notes)}
            mu = np.array([float(s.to_unconstrained(pooled[s.name])) for s in model.params])
        start = summarise_subject_fits(
            np.tile(mu, (n, 1)), np.full((n, k), np.nan), np.zeros(n, bool), mu
        )
        notes.append(
            "hierarchical start (contest model): every subject at the pooled ML estimate, "
            f"population sd {start.sd[0]:g} on the unconstrained scale (no per-subject fits)"
        )
        return start
    try:
        z, se, identified = per_subject_estimates(model, data)
    except StopwiseInputError:
        raise
    except Exception as exc:  # the per-subject fits are only a starting point
        notes.append(
            f"hierarchical start: the per-subject ML fits failed ({type(exc).__name__}: {exc}); "
            "subjects start at the population location with sd 0.3"
        )
        z, se, identified = np.zeros((n, k)), np.full((n, k), np.nan), np.zeros(n, bool)
    if mu is None and not np.any(identified):  # no subject to summarise: the model's starts
        mu = np.array([float(s.to_unconstrained(s.start)) for s in model.params])
    start = summarise_subject_fits(z, se, identified, mu)
    notes.append(start.note)
    return start


def hierarchical_values(
    setup: Setup, start: SubjectStart, values: Mapping[str, float]
) -> dict[str, Any]:
    """Initial site values (constrained scale) for a hierarchical fit: intercepts at mu,
    covariate effects at 0, sd_z from the subjects' spread, Omega = I, and each subject at
    its clipped ML estimate (centred: z_subject_<k> = z_sk; non-centred:
    eta_<k> = (z_sk - mu_k) / sd_k, which is the same point since Omega = I)."""
    out: dict[str, Any] = dict(values)
    for k, name in enumerate(setup.names):
        if setup.has_intercept(name):
            out[f"z_{name}"] = float(start.mu[k])
        n_eff = len(setup.effect_columns(name))
        if n_eff:
            out[f"b_{name}"] = np.zeros(n_eff)
    k = len(setup.names)
    out["sd_z"] = np.asarray(start.sd, np.float64)
    if k > 1:
        out["L_corr"] = np.eye(k)
    location = np.where([setup.has_intercept(n) for n in setup.names], start.mu, 0.0)
    subject_z = np.asarray(start.subject_z, np.float64)
    for j, name in enumerate(setup.names):
        if setup.is_centred(j):
            out[f"z_subject_{name}"] = subject_z[:, j]
        else:
            out[f"eta_{name}"] = (subject_z[:, j] - location[j]) / start.sd[j]
    return out


def jitter_scales(setup: Setup, start: SubjectStart, jitter: float = 0.1) -> dict[str, Any]:
    """Per-site start jitter (unconstrained scale) small enough that no chain starts a
    subject more than half a standard error from its ML estimate: a jitter of fixed size
    can push a sharply identified subject over a cliff of the likelihood (e.g. CRRA r >= 1
    with a zero bank). With se[s, k] the subject's ML standard error (``jitter`` if unknown):

      z_subject_<k>[s]: min(jitter, se/2);  eta_<k>[s]: min(jitter, se/2) / sd_k
      non-centred k moves with mu_k, sd_k and L: z_<k>: min(jitter, min_s se/2),
      sd_z and L_corr: min(jitter, min_s se / (6 sd_k)) (|u| <= 3 sd); effects b: 0.
    """
    k = len(setup.names)
    se = start.subject_se
    if se is None:
        se = np.full((setup.n_subjects, k), np.nan)
    half = np.minimum(jitter, np.nan_to_num(se / 2.0, nan=jitter))
    out: dict[str, Any] = {}
    sd_scale = np.full(k, jitter)
    for j, name in enumerate(setup.names):
        if setup.is_centred(j):
            out[f"z_subject_{name}"] = half[:, j]
        else:
            out[f"eta_{name}"] = half[:, j] / start.sd[j]
            out[f"z_{name}"] = float(np.min(half[:, j]))
            sd_scale[j] = min(jitter, float(np.min(half[:, j])) / (3.0 * start.sd[j]))
        out[f"b_{name}"] = 0.0
    out["sd_z"] = sd_scale
    out["L_corr"] = float(np.min(sd_scale))
    return out


def initial_inverse_mass(
    setup: Setup, start: SubjectStart, args: CellArgs, dense: bool
) -> dict[tuple[str, ...], np.ndarray]:
    """NUTS's initial inverse mass matrix (structured: one block per site, the population
    sites one dense block when ``dense``) from ``start_variances``: z_subject_<k>: the
    subject variances; eta_<k>: the same / sd_k^2; z_<k>: intercept_k; b_<k>[j]:
    (sd_k^2 + median se^2) / (n var_c X_k[c, j]) (var 1 for a constant column); sd_z (log
    scale): log_sd_k; L_corr: correlation for each of its K(K-1)/2 coordinates."""
    v = start_variances(start)
    sd2 = np.asarray(start.sd, np.float64) ** 2
    blocks: dict[tuple[str, ...], np.ndarray] = {}
    population: list[np.ndarray] = []
    for k, name in enumerate(setup.names):
        if setup.has_intercept(name):
            population.append(np.atleast_1d(v.intercept[k]))
        effects = setup.effect_columns(name)
        if effects:
            columns = np.asarray(args.designs[name], np.float64)[:, list(effects)]
            spread = np.var(columns, axis=0)
            spread = np.where(spread > 0, spread, 1.0)
            population.append(v.intercept[k] / spread)
        site = f"z_subject_{name}" if setup.is_centred(k) else f"eta_{name}"
        subject = v.subject[:, k] if setup.is_centred(k) else v.subject[:, k] / sd2[k]
        blocks[(site,)] = subject
    k = len(setup.names)
    population.append(v.log_sd)
    if k > 1:
        population.append(np.full(k * (k - 1) // 2, v.correlation))
    diagonal = np.concatenate(population)
    names = population_sites(setup)
    if dense:
        blocks[names] = np.diag(diagonal)
    else:
        sizes = [len(p) for p in population]
        for site, part in zip(names, np.split(diagonal, np.cumsum(sizes)[:-1])):
            blocks[(site,)] = part
    return blocks


def pooled_log_prior(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """log prior of the pooled population sites: the intercepts' priors through their
    transforms plus Normal(0, COEF_SD) for every covariate effect."""
    effects = [
        jnp.sum(dist.Normal(0.0, COEF_SD).log_prob(v)) for k, v in sites.items() if k[0] == "b"
    ]
    return intercept_prior(setup, sites) + sum(effects, jnp.zeros(()))


def population_sites(setup: Setup) -> tuple[str, ...]:
    """Names of the population-level sites (one dense block of the mass matrix)."""
    names: list[str] = []
    for name in setup.names:
        if setup.has_intercept(name):
            names.append(f"z_{name}")
        if setup.effect_columns(name):
            names.append(f"b_{name}")
    if setup.hierarchical:
        names.append("sd_z")
        if len(setup.names) > 1:
            names.append("L_corr")
    return tuple(names)


def mle_estimates(model: Model, data: Any, formulas: Any, notes: list[str]) -> dict[str, float]:
    """Natural-scale ML estimates of the parameters (intercepts), or {} with a note."""
    try:
        from stopwise.estimation.mle import fit_mle
    except ImportError:
        notes.append(
            "init='mle': the ML engine is not available; started at the model's start values"
        )
        return {}
    try:
        fit = fit_mle(model, data, se=None, formulas=formulas)
        frame = fit.params
        if "name" in getattr(frame, "columns", ()):
            frame = frame.set_index("name")
        out = {}
        for spec in model.params:
            if spec.name in frame.index:
                x = float(frame.loc[spec.name, "estimate"])
                if spec.lower < x < spec.upper and math.isfinite(x):
                    out[spec.name] = x
        return out
    except StopwiseInputError:
        raise
    except Exception as exc:  # the ML fit is only a starting point
        notes.append(
            f"init='mle': the ML fit failed ({type(exc).__name__}: {exc}); started "
            "at the model's start values"
        )
        return {}


# ---------------------------------------------------------------------------------------
# Running the sampler.


def choose_chain_method(chain_method: str, chains: int) -> str:
    """'auto' -> 'parallel' if JAX has a device per chain, else 'vectorized'."""
    if chain_method == "auto":
        return "parallel" if jax.local_device_count() >= chains and chains > 1 else "vectorized"
    if chain_method not in ("parallel", "vectorized", "sequential"):
        raise StopwiseInputError(
            f"chain_method={chain_method!r}: expected auto, parallel, vectorized or sequential"
        )
    return chain_method


def run_nuts(
    setup: Setup,
    args: CellArgs,
    *,
    chains: int,
    draws: int,
    warmup: int,
    seed: int,
    init_values: Mapping[str, Any],
    init_scales: Mapping[str, Any] | None = None,
    progress: bool,
    target_accept: float,
    max_tree_depth: int,
    chain_method: str,
    dense_mass: bool = False,
    inverse_mass: Mapping[tuple[str, ...], Any] | None = None,
    adapt_mass: bool = True,
) -> MCMC:
    """NUTS with ``chains`` chains of ``warmup`` adaptation + ``draws`` kept iterations;
    ``dense_mass``: one dense mass-matrix block for the population sites, diagonal elsewhere;
    ``inverse_mass``: the initial inverse mass matrix by site blocks (identity if None);
    ``adapt_mass``: re-estimate it from the warm-up draws (the step size is always adapted)."""
    kernel = NUTS(
        partial(numpyro_model, setup),
        target_accept_prob=target_accept,
        max_tree_depth=max_tree_depth,
        init_strategy=init_near(values=init_values, scales=init_scales),
        dense_mass=[population_sites(setup)] if dense_mass else False,
        inverse_mass_matrix=None if inverse_mass is None else dict(inverse_mass),
        adapt_mass_matrix=adapt_mass,
    )
    mcmc = MCMC(
        kernel,
        num_warmup=warmup,
        num_samples=draws,
        num_chains=chains,
        chain_method=chain_method,
        progress_bar=progress,
        jit_model_args=True,
    )
    with warnings.catch_warnings():
        # numpyro warns when it switches parallel -> sequential; we choose the method ourselves
        warnings.filterwarnings("ignore", message="There are not enough devices")
        mcmc.run(
            jax.random.PRNGKey(seed),
            args,
            extra_fields=(
                "diverging",
                "num_steps",
                "energy",
                "accept_prob",
                "adapt_state.step_size",
                "potential_energy",
            ),
        )
    return mcmc


def release_compiled_programs() -> None:
    """Drop JAX's compiled programs and NumPyro's sampler caches at the end of a fit.

    NumPyro compiles a new sampler loop for every MCMC run (the loop takes the run's
    functions as static arguments) and JAX keeps every one of them: measured about 840
    memory mappings per small pooled fit and 1,780 per hierarchical one, so a loop of fits
    in one process reached Linux's default limit of 65,530 mappings (vm.max_map_count) and
    failed after about 60 replications of a calibration study. Whatever runs next compiles
    again (the persistent compilation cache makes that cheaper)."""
    jax.clear_caches()
    for holder in (
        numpyro.util.fori_collect,
        getattr(numpyro_mcmc, "_collect_and_postprocess", None),
    ):
        cache = getattr(holder, "_cache", None)
        if hasattr(cache, "clear"):
            cache.clear()


def draws_pointwise(
    setup: Setup, samples: Mapping[str, Any], args: CellArgs, n_units: int, chunk: int = 64
) -> np.ndarray:
    """Log-likelihood per unit for every draw: sum over the unit's rows, shape
    (n_draws_total, n_units); computed in chunks of draws to bound memory."""

    def per_draw(sites: Mapping[str, Any]) -> Any:
        return jax.ops.segment_sum(row_loglik(setup, sites, args), args.row_unit, n_units)

    return map_draws(per_draw, flatten_chains(samples), chunk)


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
    from stopwise.estimation.posterior import build_posterior

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
    model, cliff_note = sample_below_cliff(  # issue 16 item 2: r < 1 where data rule out r >= 1
        model, data, hierarchical=hierarchical, formulas=formulas, priors=priors
    )
    notes += [cliff_note] if cliff_note else []
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
    from stopwise.estimation.posterior import Posterior, loo_compare

    fits = []
    for m in models:
        if isinstance(m, Posterior):
            fits.append(m)
        else:
            if data is None:
                raise StopwiseInputError("compare_bayes: data are needed to fit unfitted models")
            fits.append(fit_bayes(m, data, **kw))
    return loo_compare(fits, names=names)
