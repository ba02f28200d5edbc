"""A pooled start that is checked before the chains use it.

The Laplace start (``laplace_start``, estimation/bayes/pooled_start.py) trusts the
likelihood's normal approximation N(z_hat, H^-1) away from the ML point z_hat. On tiny data
the ML point can run off to where the likelihood is flat and a bounded parameter's prior,
seen on the unconstrained scale, has lost its curvature (log p(z) nearly linear in z). The
Laplace mode then lies out there too, and its covariance (H + P(z*))^-1 has sds of 1e5 and
more: chains jittered by them start where the density is not finite (issue 16: 5 of 2,000
replications of the crra+ch calibration study; the product's fit stopped with NumPyro's
"Cannot find valid initial parameters" on one of them).

The check: a start is refused where, in some coordinate j, its sd exceeds SPREAD_LIMIT
times the prior's own sd s_j (the curvature sd at the prior's median on the unconstrained
scale, ``prior_median_and_sd``; Normal(0, COEF_SD) for a covariate effect). A posterior is
not wider than ten prior sds in any coordinate unless the approximation has failed. An sd
under SPREAD_TRIGGER is accepted without consulting the prior (computing the prior's sds
costs about 2 s of eager JAX compilation on a first call); a jitter of that size keeps the
start finite.

A refused start is replaced by the mode of the exact pooled posterior,

  z* = argmax_z  sum_i log p(y_i | z) + log p(z),

found from the prior's centre by a trust-region Newton method with the exact Hessian
(scipy's "trust-exact", Conn, Gould & Toint 2000, which accepts the indefinite Hessian of a
posterior that is not log-concave at the prior's centre, where a Newton step on its positive
part stalls), with jitter and initial inverse mass from the inverse of -d^2 log p(z | y)/dz^2
at z*. If that search fails or its covariance is refused in turn: the prior's centre, its sd
as jitter and its variance as a diagonal inverse mass. Each replacement adds a note.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.optimize

from stopwise.estimation.bayes.density import (
    Setup,
    pooled_log_prior,
    population_sites,
    total_loglik,
)
from stopwise.estimation.bayes.laplace_mode import PriorTerms, flat_sizes, prior_terms
from stopwise.estimation.bayes.pooled_start import (
    PooledStart,
    laplace_start,
    prior_median_and_sd,
)
from stopwise.estimation.bayes.priors import COEF_SD
from stopwise.estimation.matrices import is_positive_definite, symmetric_inverse

SPREAD_TRIGGER = 5.0  # unconstrained sd under which a start is accepted unchecked
SPREAD_LIMIT = 10.0  # a start may be at most this many prior sds wide in any coordinate
MODE_GRADIENT_TOLERANCE = 1e-4  # largest |d log p(z | y) / dz_j| at an accepted exact mode

Sites = dict[str, Any]
InverseMass = dict[tuple[str, ...], np.ndarray]


@dataclass(frozen=True)
class CheckedStart:
    """Site values, jitter scales, the initial inverse mass (None: the identity), what the
    start is (for the fit's ``run["init"]``) and notes on any start that was refused."""

    values: Sites
    scales: Sites
    inverse_mass: InverseMass | None
    origin: str
    notes: tuple[str, ...] = ()


LAPLACE_ORIGIN = (
    "mode of the Laplace posterior (ML normal approximation x prior), inverse mass matrix "
    "from its covariance (warm-up start, adapted)"
)
EXACT_ORIGIN = (
    "mode of the exact posterior (the Laplace start was refused), inverse mass matrix from "
    "its inverse curvature (warm-up start, adapted)"
)
PRIOR_ORIGIN = (
    "the prior's centre (the Laplace start and the exact posterior mode were refused), "
    "inverse mass matrix from the prior's variances (warm-up start, adapted)"
)


def flatten_sites(values: Mapping[str, Any], sites: Sequence[str]) -> np.ndarray:
    """The site values in ``sites`` order as one flat vector (a z_<k> site is a scalar)."""
    return np.concatenate([np.ravel(np.asarray(values[s], np.float64)) for s in sites])


def unflatten_sites(flat: np.ndarray, sites: Sequence[str], sizes: Sequence[int]) -> Sites:
    """Inverse of ``flatten_sites``: z_<k> sites as floats, b_<k> sites as arrays."""
    parts = np.split(np.asarray(flat, np.float64), np.cumsum(sizes)[:-1])
    return {s: (float(p[0]) if s.startswith("z_") else p) for s, p in zip(sites, parts)}


@dataclass(frozen=True)
class PriorScale:
    """Per flat coordinate: the prior's centre and sd on the unconstrained scale."""

    centre: np.ndarray
    sd: np.ndarray


def prior_scale(setup: Setup, sites: Sequence[str], sizes: Sequence[int]) -> PriorScale:
    """z_<k>: the median and curvature sd of parameter k's prior (``prior_median_and_sd``);
    b_<k>: 0 and COEF_SD per covariate effect (their prior is Normal(0, COEF_SD))."""
    centre: list[float] = []
    sd: list[float] = []
    for site, size in zip(sites, sizes):
        if site.startswith("z_"):
            name = site[2:]
            median, spread = prior_median_and_sd(setup.priors[name], setup.model.spec(name))
            centre.append(median)
            sd.append(spread)
        else:
            centre += [0.0] * size
            sd += [COEF_SD] * size
    return PriorScale(np.asarray(centre), np.asarray(sd))


def refused_coordinates(sd: np.ndarray, prior: Callable[[], PriorScale]) -> list[int]:
    """Coordinates j whose start sd is not finite, or at least SPREAD_TRIGGER and above
    SPREAD_LIMIT x the prior's sd (``prior`` is called only in the latter case)."""
    sd = np.asarray(sd, np.float64)
    wide = ~np.isfinite(sd) | (sd >= SPREAD_TRIGGER)
    if not np.any(wide):
        return []
    limit = SPREAD_LIMIT * prior().sd
    return [int(j) for j in np.flatnonzero(wide) if not sd[j] <= limit[j]]


def posterior_mode(terms: PriorTerms, start: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Maximise log p(z) (``terms`` gives log p, its gradient and -Hessian) from ``start`` by
    scipy's trust-exact method; (z*, (-Hessian at z*)^-1), or None where the search fails,
    ends with a gradient above MODE_GRADIENT_TOLERANCE or a curvature that is not positive
    definite."""
    evaluated: dict[bytes, tuple[float, np.ndarray, np.ndarray]] = {}

    def at(z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        key = np.asarray(z, np.float64).tobytes()
        if key not in evaluated:
            log_p, grad, curvature = terms(np.asarray(z, np.float64))
            finite = np.isfinite(log_p) and np.all(np.isfinite(grad))
            evaluated[key] = (
                (-log_p, -grad, curvature) if finite else (np.inf, np.zeros_like(z), curvature)
            )
        return evaluated[key]

    if not np.isfinite(at(start)[0]):
        return None
    try:
        found = scipy.optimize.minimize(
            lambda z: at(z)[0],
            np.asarray(start, np.float64),
            jac=lambda z: at(z)[1],
            hess=lambda z: at(z)[2],
            method="trust-exact",
            options={"gtol": MODE_GRADIENT_TOLERANCE / 100},
        )
    except (np.linalg.LinAlgError, ValueError):
        return None
    f, grad, curvature = at(found.x)
    stationary = np.isfinite(f) and np.max(np.abs(grad)) <= MODE_GRADIENT_TOLERANCE
    if not (stationary and np.all(np.isfinite(curvature)) and is_positive_definite(curvature)):
        return None
    return np.asarray(found.x), symmetric_inverse(curvature)


def exact_posterior_terms(
    setup: Setup, args: Any, sites: Sequence[str], sizes: Sequence[int]
) -> PriorTerms:
    """(log p(z | y) + const, gradient, -Hessian) of the pooled posterior over the flat
    population sites: sum_i log p(y_i | z) + log p(z) (estimation/bayes/density.py)."""

    def log_posterior(values: Mapping[str, Any]) -> Any:
        return pooled_log_prior(setup, values) + total_loglik(setup, values, args)

    return prior_terms(log_posterior, sites, sizes)


def checked_pooled_start(
    setup: Setup,
    args: Any,
    pooled: PooledStart,
    prior: PriorTerms,
) -> CheckedStart:
    """The Laplace start (``laplace_start``) if ``refused_coordinates`` accepts it, else the
    exact posterior mode (``posterior_mode`` from the prior's centre), else the prior's
    centre and variances (module docstring). ``prior`` gives the pooled log prior's terms;
    the exact posterior's (``exact_posterior_terms``, a compilation of the likelihood's
    Hessian) are built only when the Laplace start is refused. Starts without a mass block
    (a direction that neither the data nor the prior curve) are returned as
    ``laplace_start`` gives them."""
    sites = population_sites(setup)
    values, scales, inverse_mass = laplace_start(
        pooled, setup.names, setup.coef_names, sites, prior
    )
    if inverse_mass is None:  # no curvature in some direction: the ML point, identity mass
        return CheckedStart(values, scales, None, "ML estimate")
    sizes = flat_sizes(sites, values)
    # the prior's centre and sds, computed on first use only (about 2 s on a first call)
    scale = functools.cache(functools.partial(prior_scale, setup, sites, sizes))
    laplace_sd = flatten_sites(scales, sites)
    refused = refused_coordinates(laplace_sd, scale)
    if not refused:
        return CheckedStart(values, scales, inverse_mass, LAPLACE_ORIGIN)
    flat_names = [f"{s}[{i}]" if n > 1 else s for s, n in zip(sites, sizes) for i in range(n)]
    what = ", ".join(
        f"{flat_names[j]} {laplace_sd[j]:,.3g} against the prior's {scale().sd[j]:.3g}"
        for j in refused
    )
    notes = [
        f"pooled start: the Laplace start was refused (its sd in {what}, more than "
        f"{SPREAD_LIMIT:g} prior sds: the ML point lies where the likelihood is flat)"
    ]
    found = posterior_mode(exact_posterior_terms(setup, args, sites, sizes), scale().centre)
    mode, cov = found if found is not None else (None, None)
    if cov is not None and not refused_coordinates(np.sqrt(np.diag(cov)), scale):
        notes.append(
            "pooled start: the chains start at the exact posterior mode, found from the "
            "prior's centre, jittered by one sd of its inverse curvature"
        )
        return CheckedStart(
            unflatten_sites(mode, sites, sizes),
            unflatten_sites(np.sqrt(np.diag(cov)), sites, sizes),
            {tuple(sites): cov},
            EXACT_ORIGIN,
            tuple(notes),
        )
    notes.append(
        "pooled start: the exact posterior mode was not found or was as wide; the chains "
        "start at the prior's centre, jittered by one prior sd"
    )
    return CheckedStart(
        unflatten_sites(scale().centre, sites, sizes),
        unflatten_sites(scale().sd, sites, sizes),
        {tuple(sites): np.diag(scale().sd ** 2)},
        PRIOR_ORIGIN,
        tuple(notes),
    )
