"""Reported quantities of a Bayesian fit, computed for every posterior draw.

  <k>            pooled: the parameter on its natural scale, to_natural(intercept of z_k)
  <k>:<column>   a covariate effect on the unconstrained scale (as the ML engine names it)
  hierarchical:  "<k>: population median", "<k>: population mean", "<k>: between-subject
                 sd", "<k>: between-subject sd (unconstrained scale)" and "<j>, <k>:
                 between-subject correlation (unconstrained scale)"; see
                 estimation/bayes/labels.py. The population mean and sd of the natural-scale
                 parameter are E[to_natural(mu_k + sd_k e)], e ~ Normal(0, 1), and its sd, by
                 40-point Gauss-Hermite quadrature
  <k>_subject    hierarchical: each subject's natural-scale parameter (at the covariates of
                 the subject's first row)

plus the sampler statistics and observed data for ArviZ, and the log-likelihood at the
posterior mean of each cell's natural-scale parameters.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from itertools import combinations
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.arrays import LotteryData
from stopwise.estimation.bayes import labels as bayes_labels
from stopwise.estimation.bayes.density import cell_z

# ---------------------------------------------------------------------------------------
# Derived draws.


def gauss_hermite_moments(spec: Any, mu: Any, sd: Any, n: int = 40) -> tuple[Any, Any]:
    """Mean and sd of x = to_natural(mu + sd e), e ~ Normal(0, 1):
    E[g] ~= sum_j w_j g(mu + sqrt(2) sd t_j) / sqrt(pi)   (Gauss-Hermite nodes t, weights w)."""
    t, w = np.polynomial.hermite.hermgauss(n)
    w = jnp.asarray(w / math.sqrt(math.pi))
    x = spec.to_natural(
        jnp.asarray(mu)[..., None] + math.sqrt(2.0) * jnp.asarray(sd)[..., None] * jnp.asarray(t)
    )
    mean = jnp.sum(w * x, axis=-1)
    var = jnp.sum(w * (x - mean[..., None]) ** 2, axis=-1)
    return mean, jnp.sqrt(jnp.maximum(var, 0.0))


def derived_draws(
    setup: Any, samples: Mapping[str, Any], args: Any, first_cell_of_subject: np.ndarray | None
) -> dict[str, np.ndarray]:
    """Reported quantities (module docstring) for every draw, shape (chains, draws, ...);
    one compiled call (eager JAX would compile every primitive separately)."""
    first = None if first_cell_of_subject is None else tuple(map(int, first_cell_of_subject))
    out = _derived_jit(setup, first, {k: jnp.asarray(v) for k, v in samples.items()}, args)
    return {k: np.asarray(v) for k, v in out.items()}


def _derived_draws(
    setup: Any, samples: Mapping[str, Any], args: Any, first: tuple[int, ...] | None
) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, spec in enumerate(setup.specs):
        name = spec.name
        if setup.has_intercept(name):
            label = bayes_labels.population_median(name) if setup.hierarchical else name
            out[label] = spec.to_natural(samples[f"z_{name}"])
        effects = [c for c in setup.coef_names[name] if c != "Intercept"]
        for e, column in enumerate(effects):
            out[bayes_labels.covariate_effect(name, column)] = samples[f"b_{name}"][..., e]
        if setup.hierarchical:
            sd = samples["sd_z"][..., k]
            if setup.has_intercept(name):
                mean, sd_nat = gauss_hermite_moments(spec, samples[f"z_{name}"], sd)
                out[bayes_labels.population_mean(name)] = mean
                out[bayes_labels.between_subject_sd(name)] = sd_nat
            out[bayes_labels.between_subject_sd_unconstrained(name)] = sd
    if setup.hierarchical and len(setup.names) > 1:
        chol = samples["L_corr"]
        corr = chol @ jnp.swapaxes(chol, -1, -2)
        for i, j in combinations(range(len(setup.names)), 2):
            label = bayes_labels.between_subject_correlation(setup.names[i], setup.names[j])
            out[label] = corr[..., i, j]
    if setup.hierarchical and first is not None:
        z = jax.vmap(jax.vmap(lambda s: cell_z(setup, s, args)))(dict(samples))
        index = jnp.asarray(first)
        for spec in setup.specs:
            out[f"{spec.name}_subject"] = spec.to_natural(z[spec.name][..., index])
    return out


_derived_jit = jax.jit(
    lambda setup, first, samples, args: _derived_draws(setup, samples, args, first),
    static_argnums=(0, 1),
)


def sample_stats(extra: Mapping[str, Any], max_tree_depth: int) -> dict[str, np.ndarray]:
    """NumPyro's extra fields under ArviZ's sample_stats names."""
    steps = np.asarray(extra["num_steps"])
    return {
        "diverging": np.asarray(extra["diverging"]).astype(bool),
        "energy": np.asarray(extra["energy"]),
        "n_steps": steps,
        "tree_depth": np.ceil(np.log2(steps + 1.0)).astype(int),
        "reached_max_treedepth": steps >= 2**max_tree_depth - 1,
        "acceptance_rate": np.asarray(extra["accept_prob"]),
        "step_size": np.asarray(extra["adapt_state.step_size"]),
        "lp": -np.asarray(extra["potential_energy"]),
    }


def observed_data(data: Any) -> dict[str, np.ndarray]:
    if isinstance(data, LotteryData):
        return {"choice_b": np.asarray(data.choice_b), "subject": np.asarray(data.subject)}
    return {
        name: np.asarray(getattr(data, name))
        for name in ("draw", "bust", "step", "cond", "subject", "trial")
    }


def loglik_at_posterior_mean(setup: Any, samples: Mapping[str, Any], args: Any) -> float:
    """sum_c sum_i weight * loglik_obs(mean over draws of theta_c, data_c)[i]."""
    flat = {k: jnp.reshape(jnp.asarray(v), (-1, *np.shape(v)[2:])) for k, v in samples.items()}

    @jax.jit
    def value(flat: Mapping[str, Any]) -> Any:
        z = jax.vmap(lambda s: cell_z(setup, s, args))(flat)
        theta = {spec.name: jnp.mean(spec.to_natural(z[spec.name]), axis=0) for spec in setup.specs}
        ll = jax.vmap(setup.model.loglik_obs)(theta, args.data)
        return jnp.sum(args.weight * jnp.where(args.weight > 0, ll, 0.0))

    return float(value(flat))
