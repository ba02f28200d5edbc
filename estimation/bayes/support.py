"""Pooled Bayesian fits of CRRA models: sample r only where the likelihood can be positive.

CRRA utility u(x) = (x^(1-r) - 1) / (1 - r) has u(0) = -1 / (1 - r) for r < 1 and
u(0) = -infinity for r >= 1 (a fact of the trade; the models use the floor -1e100 there,
models/utility.py). With a bank of zero after a bust, a decision to draw at a positive bank
b with a bust chance 1 - p has the utility difference

    Q_draw - u(b) = p (V_next - u(b)) + (1 - p) (u(0) - u(b)),

whose bust term grows like -(1 - p) / (1 - r) as r -> 1 from below and is about -1e100 for
every r >= 1. Data that hold one such draw give the likelihood a ridge precision ~ (1 - r)
ending at a cliff at r = 1, beyond which it is zero for practical purposes (log-likelihood
about -precision * 1e100). NUTS's leapfrog steps that cross the cliff are the divergences of
the pooled planner model (benchmarks/RESULTS.md, "where the pooled planner model diverges").

For such data the posterior has no mass at r >= 1, so r can be sampled on (lower, 1) instead
of (lower, upper) without changing the posterior: the prior is the same density truncated to
where the likelihood is positive. The logit transform of the new bounds also straightens the
ridge: with r = lower + (1 - lower) sigmoid(z), 1 - r ~ (1 - lower) e^(-z) for large z, so
log precision + z is about constant along it, a straight line in the sampler's coordinates,
which the dense Laplace mass matrix of the pooled start (estimation/bayes/pooled_start.py) follows.

The check, per data set: the summed log-likelihood at r in {1, (1 + upper) / 2, upper - 1e-6}
and every other parameter on a grid of its prior's quantiles {1e-300, 1/2, 1 - 1e-300} (plus
the start value) is at most ``IMPOSSIBLE`` = -1e10 at every grid point. The region left out
is then r >= 1 with some other parameter beyond its prior's 1e-300 quantile (prior mass below
1e-300 per parameter) or a log-likelihood below -1e10. Only normal and log-normal priors
(whose quantiles have closed forms) are checked; any other prior (e.g. a tremble's Beta, under
which r >= 1 keeps a positive likelihood anyway) leaves the bounds alone. Hierarchical and
formula fits keep the bounds too: a cell or subject whose own data allow r >= 1 would be cut
off by a bound shared by all of them.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import replace
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import numpyro.distributions as dist
from scipy.special import ndtri

from stopwise.data_schemas.arrays import StoppingData
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.models.base import Model, ParamSpec

IMPOSSIBLE = -1e10  # a summed log-likelihood this low is zero probability in practice
CLIFF = 1.0  # CRRA's r at which u(0) becomes -infinity
TAIL = 1e-300  # prior quantiles checked on each side


def prior_quantiles(prior: Any, spec: ParamSpec) -> list[float] | None:
    """{TAIL, 1/2, 1 - TAIL} quantiles of a Normal or LogNormal prior, kept inside the
    bounds, plus the start value; None for any other prior family.

    Normal(m, s): m + s Phi^-1(q);  LogNormal(m, s): exp(m + s Phi^-1(q))."""
    d = prior.distribution
    if isinstance(d, dist.LogNormal):
        m, s = float(d.base_dist.loc), float(d.base_dist.scale)
        values = [math.exp(m + s * float(ndtri(q))) for q in (TAIL, 0.5, 1.0 - TAIL)]
    elif isinstance(d, dist.Normal):
        m, s = float(d.loc), float(d.scale)
        values = [m + s * float(ndtri(q)) for q in (TAIL, 0.5, 1.0 - TAIL)]
    else:
        return None
    inside = [min(max(v, spec.lower), spec.upper) for v in values]
    inside = [v for v in inside if spec.lower < v < spec.upper]
    return sorted({*inside, spec.start})


def has_crra_cliff(model: Model) -> bool:
    """The model's utility is CRRA and its r may cross the cliff at r = 1."""
    if model.data_kind != "stopping" or model.name.split("+")[0] != "crra":
        return False
    if "r" not in model.param_names:
        return False
    spec = model.spec("r")
    return spec.lower < CLIFF < spec.upper


def summed_loglik_at(model: Model, data: Any, points: list[dict[str, float]]) -> np.ndarray:
    """sum_i loglik_obs(theta, data)_i at each parameter point (one compiled vmap)."""
    plain = replace(data, covariates={}, subject_labels=None, trial_labels=None)
    stacked = {name: jnp.asarray([p[name] for p in points]) for name in model.param_names}

    def total(theta: dict[str, Any]) -> Any:
        return jnp.sum(model.loglik_obs(theta, plain))

    return np.asarray(jax.jit(jax.vmap(total))(stacked))


def cliff_grid(model: Model, priors: dict[str, Any]) -> list[dict[str, float]] | None:
    """Points with r at or beyond the cliff and the other parameters on their quantile grid."""
    spec = model.spec("r")
    r_values = [CLIFF, 0.5 * (CLIFF + spec.upper), spec.upper - 1e-6]
    others = []
    for name in model.param_names:
        if name == "r":
            continue
        grid = prior_quantiles(priors[name], model.spec(name))
        if grid is None:
            return None
        others.append((name, grid))
    names = [n for n, _ in others]
    points = []
    for r in r_values:
        for combo in itertools.product(*[g for _, g in others]):
            points.append({"r": r, **dict(zip(names, combo))})
    return points


def below_cliff(spec: ParamSpec) -> ParamSpec:
    """r's spec on (lower, 1), its start moved inside if needed."""
    start = spec.start if spec.start < CLIFF else 0.5 * (spec.lower + CLIFF)
    return replace(spec, upper=CLIFF, start=start)


def sample_below_cliff(
    model: Model, data: Any, *, hierarchical: bool, formulas: Any, priors: Any
) -> tuple[Model, str | None]:
    """(model with r on (lower, 1), note) when the check of the module docstring shows the
    likelihood is zero at r >= 1, else (model, None) unchanged."""
    if hierarchical or formulas or not isinstance(data, StoppingData):
        return model, None
    if not has_crra_cliff(model):
        return model, None
    grid = cliff_grid(model, resolve_priors(model, priors))
    if grid is None:
        return model, None
    worst = float(np.max(summed_loglik_at(model, data, grid)))
    if not worst <= IMPOSSIBLE:
        return model, None
    params = tuple(below_cliff(p) if p.name == "r" else p for p in model.params)
    note = (
        f"r sampled on ({model.spec('r').lower:g}, 1): with a zero bank after a bust, CRRA's "
        "u(0) is -infinity for r >= 1 and these data make the likelihood zero there (largest "
        f"summed log-likelihood at r >= 1 over {len(grid)} points spanning the other "
        f"parameters' prior quantiles 1e-300 to 1 - 1e-300: {worst:.3g}); the posterior is "
        "unchanged (what is left out has likelihood below exp(-1e10) or prior mass below "
        "1e-300) and the sampler no longer crosses the cliff at r = 1"
    )
    return replace(model, params=params), note
