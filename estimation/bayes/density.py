"""The Bayesian model density: NumPyro sites -> per-cell parameters -> log-likelihood.

Rows are grouped in cells (estimation/cells.py) that share one parameter vector; with k the
model's parameters on their unconstrained scale z (x = ParamSpec.to_natural(z)):

  pooled:        z_k[c] = X_k[c] @ b_k
  hierarchical:  z_k[c] = X_k[c] @ b_k + u[s(c), k],   u_s ~ MVN(0, diag(sd) Omega diag(sd)),
                 L L^T = Omega ~ LKJ(2),  sd_k ~ HalfNormal(1); with mu_k the intercept of
                 b_k (0 for a parameter without intercept), each parameter k is sampled
                 centred (site z_subject_<k> = mu_k + u_k) or non-centred (site eta_<k>),
                 by the rule in estimation/bayes/subject_start.py (``parametrisation``); see
                 ``subject_offsets`` for the conditional (Cholesky-order) construction

where X_k is the patsy design of the formula ``k ~ rhs`` (a column of ones without one), s(c)
the subject of cell c, and the intercept of b_k carries the parameter's natural-scale prior
(estimation/bayes/priors.py) through the change of variables; other effects ~ Normal(0, 1).
The log-likelihood added to the joint density is

  sum_c sum_i w[c, i] * loglik_obs(theta_c, data_c)[i],    theta_c = to_natural(z[c]),

where w[c, i] counts the data rows each distinct row stands for (0 on padding;
estimation/bayes/prepare.py).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpyro
import numpyro.distributions as dist
import numpyro.util
from numpyro.distributions import constraints

from stopwise.estimation.bayes.priors import (
    COEF_SD,
    HYPER_SD_SCALE,
    LKJ_CONCENTRATION,
    Prior,
)
from stopwise.estimation.bayes.whiten import WHITE_SITE, sites_from_white, subject_site_names
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
    whitened: bool = False  # hierarchical: subject sites drawn as w (estimation/bayes/whiten.py)

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
    whitening: Any = None  # SubjectWhitening when setup.whitened (estimation/bayes/whiten.py)


jax.tree_util.register_pytree_node(
    CellArgs,
    lambda a: (
        (
            a.data,
            a.weight,
            dict(a.designs),
            a.cell_subject,
            a.row_cell,
            a.row_pos,
            a.row_unit,
            a.whitening,
        ),
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
        sites.update(subject_sites(setup, args))
        numpyro.factor("population", jitted_hierarchical_log_density(setup, sites))
    numpyro.factor("prior", jitted_intercept_prior(setup, sites))
    numpyro.factor("loglik", jitted_total_loglik(setup, sites, args))


def subject_sites(setup: Setup, args: CellArgs) -> dict[str, Any]:
    """The subject sites z_subject_<k> / eta_<k> (n_subjects,) each: sampled directly, or,
    when ``setup.whitened``, built as x_s = a_s + A_s w_s from one site w_subject (n, K)
    (estimation/bayes/whiten.py; constant Jacobian, so no density term is added)."""
    names = subject_site_names(
        setup.names, tuple(setup.is_centred(j) for j in range(len(setup.names)))
    )
    if setup.whitened:
        shape = (setup.n_subjects, len(setup.names))
        w = numpyro.sample(WHITE_SITE, dist.ImproperUniform(constraints.real, (), shape))
        x = sites_from_white(w, args.whitening)
        return {site: x[:, j] for j, site in enumerate(names)}
    real = dist.ImproperUniform(constraints.real, (), (setup.n_subjects,))
    return {site: numpyro.sample(site, real) for site in names}


def intercept_prior(setup: Setup, sites: Mapping[str, Any]) -> Any:
    """sum_k log prior_k(to_natural(z_k)) + log |dx/dz| at the intercepts z_k."""
    total = jnp.zeros(())
    for spec in setup.specs:
        if setup.has_intercept(spec.name):
            prior = setup.priors[spec.name]
            total = total + prior.log_density_unconstrained(spec, sites[f"z_{spec.name}"])
    return total


jitted_intercept_prior = jax.jit(intercept_prior, static_argnums=0)


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
