"""Prior distributions for the Bayesian engine, stated on the natural parameter scale.

A prior is a NumPyro distribution over the natural value x of one parameter, truncated to the
parameter's bounds (lo, hi). The sampler works on the unconstrained scale z of
``ParamSpec`` (x = to_natural(z)), so the log density it adds is

    log p(z) = log prior(to_natural(z)) + log |dx/dz|            (change of variables)

and truncation only changes a constant (irrelevant for the posterior; prior draws for
simulation-based calibration reject values outside the bounds).

Default, weakly informative priors (by parameter name; ``s`` is the parameter's start value):

    r              Normal(0, 1)                     risk neutrality +- 1 (CRRA curvature)
    a              Normal(0, 1)                     CARA coefficient
    alpha, beta    LogNormal(0, 0.5)                median 1 (linear value function)
    loss_aversion  LogNormal(0, 0.75)               median 1 (no loss aversion)
    gamma, delta   LogNormal(0, 0.5)                median 1 (no probability weighting)
    precision      LogNormal(log s, 1.5)            median at the model's start value
    sigma          LogNormal(log s, 1.5)            median at the model's start value
    tau            LogNormal(log 1.5, 0.75)         median 1.5 thinking steps
    tremble        Beta(1, 9)                       mean 0.1
    any other      by its bounds: Uniform(lo, hi) when both are finite; LogNormal(log(s-lo), 1.5)
                   shifted by lo when only the lower bound is finite (mirrored for an upper
                   bound); Normal(s, 2.5) when unbounded.

Population level of a hierarchical fit (unconstrained scale z, per parameter k):
location mu_k gets the parameter's natural-scale prior through the same change of variables,
scale sd_k ~ HalfNormal(1), correlations ~ LKJ(2), covariate effects ~ Normal(0, 1).

Users override any entry with ``priors={"r": "normal(0.5, 0.5)"}`` (a string parsed without
eval: normal, lognormal, beta, uniform, gamma, halfnormal, student_t) or a NumPyro
distribution object.
"""

from __future__ import annotations

import math
import re
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import numpyro.distributions as dist

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import Model, ParamSpec

HYPER_SD_SCALE = 1.0  # sd_k ~ HalfNormal(HYPER_SD_SCALE) on the unconstrained scale
LKJ_CONCENTRATION = 2.0  # Cholesky factor of the correlation matrix ~ LKJCholesky(K, 2)
COEF_SD = 1.0  # covariate effects on the unconstrained scale ~ Normal(0, COEF_SD)


@dataclass(frozen=True)
class Prior:
    """A natural-scale prior for one parameter: a NumPyro distribution and its description."""

    name: str
    distribution: Any
    text: str

    def log_density_unconstrained(self, spec: ParamSpec, z: Any) -> Any:
        """log prior(to_natural(z)) + log |dx/dz| (the density of z implied by the prior)."""
        return self.distribution.log_prob(spec.to_natural(z)) + spec.log_abs_det_jacobian(z)

    def sample(self, spec: ParamSpec, key: Any, n: int) -> np.ndarray:
        """``n`` exact draws from the prior truncated to (lower, upper), by rejection."""
        out: list[np.ndarray] = []
        have = 0
        for _ in range(200):
            key, sub = jax.random.split(key)
            x = np.asarray(self.distribution.sample(sub, (max(4 * n, 64),)), dtype=float)
            x = x[(x > spec.lower) & (x < spec.upper) & np.isfinite(x)]
            out.append(x)
            have += len(x)
            if have >= n:
                return np.concatenate(out)[:n]
        raise StopwiseInputError(
            f"prior for {self.name} ({self.text}) puts almost no mass inside the parameter "
            f"bounds ({spec.lower}, {spec.upper}); choose a prior that covers them"
        )


def _lognormal(median: float, sd_log: float) -> tuple[Any, str]:
    return dist.LogNormal(math.log(median), sd_log), f"LogNormal(log {median:g}, {sd_log:g})"


def _shifted_lognormal(spec: ParamSpec) -> tuple[Any, str]:
    """Positive-part priors for one-sided bounds: lo + LogNormal(log(s - lo), 1.5)."""
    if math.isfinite(spec.lower):
        base = dist.LogNormal(math.log(spec.start - spec.lower), 1.5)
        shift = dist.transforms.AffineTransform(spec.lower, 1.0)
        text = f"{spec.lower:g} + LogNormal(log {spec.start - spec.lower:g}, 1.5)"
    else:
        base = dist.LogNormal(math.log(spec.upper - spec.start), 1.5)
        shift = dist.transforms.AffineTransform(spec.upper, -1.0)
        text = f"{spec.upper:g} - LogNormal(log {spec.upper - spec.start:g}, 1.5)"
    return dist.TransformedDistribution(base, shift), text


def default_prior(spec: ParamSpec) -> Prior:
    """The documented default prior for a parameter (see the module docstring)."""
    name, s = spec.name, spec.start
    if name in ("r", "a"):
        d, text = dist.Normal(0.0, 1.0), "Normal(0, 1)"
    elif name in ("alpha", "beta", "gamma", "delta"):
        d, text = _lognormal(1.0, 0.5)
    elif name == "loss_aversion":
        d, text = _lognormal(1.0, 0.75)
    elif name in ("precision", "sigma") and s > 0:
        d, text = _lognormal(s, 1.5)
    elif name == "tau":
        d, text = _lognormal(1.5, 0.75)
    elif name == "tremble":
        d, text = dist.Beta(1.0, 9.0), "Beta(1, 9)"
    elif math.isfinite(spec.lower) and math.isfinite(spec.upper):
        d, text = dist.Uniform(spec.lower, spec.upper), f"Uniform({spec.lower:g}, {spec.upper:g})"
    elif math.isfinite(spec.lower) or math.isfinite(spec.upper):
        d, text = _shifted_lognormal(spec)
    else:
        d, text = dist.Normal(s, 2.5), f"Normal({s:g}, 2.5)"
    return Prior(name, d, _with_bounds(text, spec))


def _with_bounds(text: str, spec: ParamSpec) -> str:
    if math.isfinite(spec.lower) or math.isfinite(spec.upper):
        return f"{text} on ({spec.lower:g}, {spec.upper:g})"
    return text


_FAMILIES: dict[str, tuple[int, Any]] = {
    "normal": (2, lambda a: dist.Normal(a[0], a[1])),
    "lognormal": (2, lambda a: dist.LogNormal(a[0], a[1])),
    "beta": (2, lambda a: dist.Beta(a[0], a[1])),
    "uniform": (2, lambda a: dist.Uniform(a[0], a[1])),
    "gamma": (2, lambda a: dist.Gamma(a[0], a[1])),
    "halfnormal": (1, lambda a: dist.HalfNormal(a[0])),
    "student_t": (3, lambda a: dist.StudentT(a[0], a[1], a[2])),
}
_PRIOR_TEXT = re.compile(r"^\s*([a-z_]+)\s*\(([^()]*)\)\s*$", re.IGNORECASE)


def parse_prior(text: str, name: str = "?") -> Any:
    """Parse ``"family(a, b)"`` into a NumPyro distribution (numbers only; never eval)."""
    match = _PRIOR_TEXT.match(text)
    known = ", ".join(f"{k}({', '.join(['.'] * n)})" for k, (n, _) in _FAMILIES.items())
    if not match or match.group(1).lower() not in _FAMILIES:
        raise StopwiseInputError(f"prior for {name}: cannot read {text!r}; expected one of {known}")
    family = match.group(1).lower()
    n_args, make = _FAMILIES[family]
    try:
        args = [float(v) for v in match.group(2).split(",") if v.strip()]
    except ValueError as exc:
        raise StopwiseInputError(f"prior for {name}: {text!r} has a non-numeric argument") from exc
    if len(args) != n_args or not all(math.isfinite(v) for v in args):
        raise StopwiseInputError(
            f"prior for {name}: {family} takes {n_args} finite numbers, got {text!r}"
        )
    try:
        return make(args)
    except ValueError as exc:
        raise StopwiseInputError(f"prior for {name}: invalid arguments in {text!r}") from exc


def resolve_priors(model: Model, priors: Mapping[str, Any] | None = None) -> dict[str, Prior]:
    """Default priors for every parameter of ``model``, with user overrides applied."""
    priors = dict(priors or {})
    unknown = sorted(set(priors) - set(model.param_names))
    if unknown:
        raise StopwiseInputError(
            f"priors given for {unknown}, which model {model.name} does not have; "
            f"its parameters are {list(model.param_names)}"
        )
    out: dict[str, Prior] = {}
    for spec in model.params:
        given = priors.get(spec.name)
        if given is None:
            out[spec.name] = default_prior(spec)
        elif isinstance(given, str):
            out[spec.name] = Prior(
                spec.name, parse_prior(given, spec.name), _with_bounds(given.strip(), spec)
            )
        elif isinstance(given, dist.Distribution):
            out[spec.name] = Prior(spec.name, given, _with_bounds(_describe(given), spec))
        else:
            raise StopwiseInputError(
                f"prior for {spec.name}: expected a string like 'normal(0, 1)' or a NumPyro "
                f"distribution, got {type(given).__name__}"
            )
        _check_prior_inside_bounds(out[spec.name], spec)
    return out


def _describe(d: Any) -> str:
    args = ", ".join(
        f"{k}={float(jnp.asarray(getattr(d, k))):g}"
        for k in getattr(d, "arg_constraints", {})
        if jnp.ndim(getattr(d, k, 0.0)) == 0
    )
    return f"{type(d).__name__}({args})"


def _check_prior_inside_bounds(prior: Prior, spec: ParamSpec) -> None:
    """The prior must give the start value a finite density (else the sampler cannot start)."""
    with warnings.catch_warnings():  # out-of-support values are what we test for
        warnings.simplefilter("ignore")
        value = float(prior.distribution.log_prob(jnp.asarray(spec.start)))
    if not math.isfinite(value):
        raise StopwiseInputError(
            f"prior for {spec.name} ({prior.text}) has zero density at the start value "
            f"{spec.start:g} inside the bounds ({spec.lower:g}, {spec.upper:g})"
        )


def hyperprior_text() -> dict[str, str]:
    """The population-level priors of hierarchical fits (unconstrained scale)."""
    return {
        "location": "the parameter's natural-scale prior on the population median",
        "sd": f"HalfNormal({HYPER_SD_SCALE:g}) on the unconstrained scale",
        "correlation": f"LKJ({LKJ_CONCENTRATION:g})",
        "covariate effects": f"Normal(0, {COEF_SD:g}) on the unconstrained scale",
    }
