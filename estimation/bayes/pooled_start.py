"""Where a pooled Bayesian fit starts: the ML estimate and its covariance.

A pooled model has a handful of coefficients and usually thousands of decisions, so its
posterior is close to the normal approximation N(z_hat, H^-1), with z_hat the ML estimate on
the unconstrained scale and H the Hessian of the negative log-likelihood there (the prior
adds little at that size; the warm-up adapts what remains). NUTS with the inverse mass
matrix M^-1 = H^-1 sees a nearly standard normal target, for which its trajectories are
short and its draws nearly independent; started from the identity it spends the warm-up
learning the scales and its first windows are poorly adapted (issue 16: bulk ESS 388 of
1,000 draws for ``precision`` on 8,752 decisions).

The chains start at the mode z* of the Laplace posterior N(z_hat, H^-1) x prior, z* + U(-1, 1)
* sd_j per coefficient with sd_j the sd of (H + P(z*))^-1, P the prior's curvature
(``laplace_start``, estimation/bayes/laplace_mode.py): one posterior sd apart, so that R-hat
still compares chains that did not start at one point. With informative data this is z_hat
and H^-1; where the likelihood is flat the prior sets the place and the width. The start is
checked before the chains use it: one wider than ten prior sds in some coordinate is
refused and replaced by the exact posterior mode (estimation/bayes/mode_start.py).

The ML coefficients are ordered parameter by parameter in design-column order
(estimation/ml/mle.py); the sampler's population sites are z_<k> (the intercept) and b_<k>
(the other columns) in the same parameter order (estimation/bayes/density.py); ``site_order`` maps
one to the other by column name.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from functools import partial
from typing import Any

import jax
import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.laplace_mode import (
    PriorTerms,
    laplace_mode,
    laplace_mode_from_precision,
)
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.loss_side import data_has_losses, loss_parameters
from stopwise.estimation.matrices import positive_part
from stopwise.estimation.point_fits import PointFits, require_point_fits


@dataclass(frozen=True)
class PooledStart:
    """Natural-scale ML estimates of the intercepts, the ML coefficients and covariance in
    ML coefficient order (None if unavailable), and notes saying what was done. Where the ML
    Hessian is not positive definite ``cov`` is None and ``precision`` holds its positive
    part (a flat direction has curvature 0 there), for the prior to fill."""

    natural: dict[str, float]
    coef: np.ndarray | None
    cov: np.ndarray | None
    notes: list[str] = field(default_factory=list)
    jitter: np.ndarray | None = None  # start jitter per coefficient (default: sqrt diag cov)
    precision: np.ndarray | None = None  # positive part of a non-positive-definite ML Hessian
    # the prior's centre, computed only if the mode search cannot start at z_hat (a first
    # call costs about 2.7 s of eager JAX compilation; ``lazy_start``)
    centre_start: Callable[[], np.ndarray] | None = None

    @property
    def has_curvature(self) -> bool:
        """The likelihood's curvature is known: an ML covariance, or a Hessian's positive part."""
        return self.coef is not None and (self.cov is not None or self.precision is not None)

    @property
    def usable(self) -> bool:
        return self.coef is not None and self.cov is not None


def site_order(
    names: Sequence[str], coef_names: Mapping[str, Sequence[str]]
) -> list[tuple[str, int]]:
    """For each ML coefficient (parameter by parameter, design-column order) the sampler
    site and position it feeds: ("z_<k>", 0) for an intercept, ("b_<k>", e) for the e-th
    other column."""
    out: list[tuple[str, int]] = []
    for name in names:
        effect = 0
        for column in coef_names[name]:
            if column == "Intercept":
                out.append((f"z_{name}", 0))
            else:
                out.append((f"b_{name}", effect))
                effect += 1
    return out


def population_permutation(
    names: Sequence[str], coef_names: Mapping[str, Sequence[str]]
) -> np.ndarray:
    """Index into the ML coefficient vector that lists the coefficients in the sampler's
    flattened population-site order (per parameter: z_<k>, then b_<k>[0], b_<k>[1], ...)."""
    feeds = site_order(names, coef_names)
    order: list[int] = []
    for name in names:
        order += [i for i, (site, _) in enumerate(feeds) if site == f"z_{name}"]
        effects = [(pos, i) for i, (site, pos) in enumerate(feeds) if site == f"b_{name}"]
        order += [i for _, i in sorted(effects)]
    return np.asarray(order, dtype=np.int64)


def ml_start(model: Any, data: Any, formulas: Any, point_fits: PointFits | None) -> PooledStart:
    """The pooled ML fit (Hessian covariance, estimation/ml/mle.py) as a sampler start; a fit
    that fails or whose Hessian is not positive definite gives what it can with a note.
    Loss-side parameters the data cannot move are handled by ``start_without_losses``."""
    fit_pooled = require_point_fits(point_fits, "a pooled fit's ML start").pooled
    absent = () if formulas or data_has_losses(model, data) else loss_parameters(model)
    if absent:
        return start_without_losses(model, data, absent, fit_pooled)
    try:
        fit = fit_pooled(model, data, se="hessian", formulas=formulas, progress=False)
    except StopwiseInputError:
        raise
    except Exception as exc:  # the ML fit is only a starting point
        note = (
            f"pooled start: the ML fit failed ({type(exc).__name__}: {exc}); started at the "
            "model's start values with an identity mass matrix"
        )
        return PooledStart({}, None, None, [note])
    natural = natural_intercepts(model, fit)
    z = np.asarray(fit.z, np.float64)
    cov = None if fit.cov_z is None else np.asarray(fit.cov_z, np.float64)
    notes = []
    if not fit.converged:
        notes.append("pooled start: the ML optimiser did not converge; its point is only a start")
    if cov is None or not np.all(np.isfinite(cov)):
        notes.append(FLAT_HESSIAN_NOTE)
        centre = partial(prior_centre, model) if z.size == len(model.params) else None
        return PooledStart(
            natural, z, None, notes, precision=hessian_positive_part(fit), centre_start=centre
        )
    return PooledStart(natural, z, cov, notes)


FLAT_HESSIAN_NOTE = (
    "pooled start: the ML Hessian is not positive definite (a flat or unidentified "
    "direction); the start combines its positive part with the prior (the identity mass "
    "matrix where both leave a direction flat)"
)


def prior_centre(model: Any) -> np.ndarray:
    """Each parameter's default-prior median on the unconstrained scale (model order)."""
    priors = resolve_priors(model)
    return np.asarray(
        [prior_median_and_sd(priors[spec.name], spec)[0] for spec in model.params], np.float64
    )


def lazy_start(make: Callable[[], np.ndarray] | None, order: Any) -> Iterator[np.ndarray]:
    """make()[order], computed only when the mode search asks for it (nothing without make)."""
    if make is not None:
        yield make()[order]


def hessian_positive_part(fit: Any) -> np.ndarray | None:
    """The positive part of the ML fit's Hessian in z (negative eigenvalues set to 0), None
    if the fit did not keep a finite one."""
    hessian = getattr(fit, "extras", {}).get("hessian_z")
    if hessian is None or not np.all(np.isfinite(hessian)):
        return None
    return positive_part(np.asarray(hessian, np.float64))


def natural_intercepts(model: Any, fit: Any) -> dict[str, float]:
    """Natural-scale ML estimates of every parameter's intercept inside its bounds."""
    frame = fit.params
    if "name" in getattr(frame, "columns", ()):
        frame = frame.set_index("name")
    out: dict[str, float] = {}
    for spec in model.params:
        if spec.name in frame.index:
            x = float(frame.loc[spec.name, "estimate"])
            if math.isfinite(x) and spec.lower < x < spec.upper:
                out[spec.name] = x
    return out


def start_sites(
    start: PooledStart, names: Sequence[str], coef_names: Mapping[str, Sequence[str]]
) -> tuple[dict[str, Any], dict[str, Any]]:
    """Initial site values (z_<k>, b_<k> at the ML coefficients) and per-site jitter
    scales (one ML standard error per coefficient)."""
    assert start.coef is not None
    sd = np.sqrt(np.diag(start.cov)) if start.cov is not None else np.full(len(start.coef), 0.1)
    sd = sd if start.jitter is None else start.jitter
    values: dict[str, Any] = {}
    scales: dict[str, Any] = {}
    for name in names:
        effects = [c for c in coef_names[name] if c != "Intercept"]
        if effects:
            values[f"b_{name}"] = np.zeros(len(effects))
            scales[f"b_{name}"] = np.zeros(len(effects))
    for i, (site, pos) in enumerate(site_order(names, coef_names)):
        if site.startswith("z_"):
            values[site] = float(start.coef[i])
            scales[site] = float(sd[i])
        else:
            values[site][pos] = float(start.coef[i])
            scales[site][pos] = float(sd[i])
    return values, scales


def laplace_start(
    start: PooledStart,
    names: Sequence[str],
    coef_names: Mapping[str, Sequence[str]],
    sites: Sequence[str],
    prior: PriorTerms,
) -> tuple[dict[str, Any], dict[str, Any], dict[tuple[str, ...], np.ndarray] | None]:
    """The sampler's start from the ML fit and the prior: site values at the mode z* of the
    Laplace posterior N(z_hat, C) x p(z) (estimation/bayes/laplace_mode.py), jitter one sd
    of its covariance (H + P(z*))^-1 per coefficient, and that covariance as NUTS's initial
    inverse mass matrix (one dense block over ``sites``, the sampler's site order). Where the
    data are informative z* = z_hat and (H + P)^-1 = C; in a direction the likelihood leaves
    flat the prior sets both the place and the width. Without an ML covariance the
    curvature is the Hessian's positive part (``start.precision``); where that and the
    prior leave a direction flat: the ML point, jitter 0.1 and no mass block (the identity)."""
    assert start.coef is not None
    order = population_permutation(names, coef_names)
    if start.cov is not None:
        found = laplace_mode(start.coef[order], start.cov[np.ix_(order, order)], prior)
    elif start.precision is not None:
        found = laplace_mode_from_precision(
            start.coef[order],
            start.precision[np.ix_(order, order)],
            prior,
            lazy_start(start.centre_start, order),
        )
    else:
        found = None
    if found is None:
        values, scales = start_sites(start, names, coef_names)
        return values, scales, None
    coef, jitter = np.empty_like(start.coef), np.empty_like(start.coef)
    coef[order] = found.mode
    jitter[order] = np.sqrt(np.diag(found.cov))
    values, scales = start_sites(replace(start, coef=coef, jitter=jitter), names, coef_names)
    return values, scales, {tuple(sites): found.cov}


FLAT_VARIANCE = 1e6  # stands in for the infinite ML variance of a direction the data leave flat


def prior_median_and_sd(prior: Any, spec: Any) -> tuple[float, float]:
    """Unconstrained median of a default prior (from 2,001 exact draws, fixed key) and the
    curvature sd there: (median z, (-d^2/dz^2 log p(z))^-1/2), log p(z) the prior's density of
    z (estimation/bayes/priors.py, ``log_density_unconstrained``)."""
    draws = prior.sample(spec, jax.random.PRNGKey(0), 2001)
    z0 = float(spec.to_unconstrained(float(np.median(draws))))
    curvature = -float(jax.hessian(lambda z: prior.log_density_unconstrained(spec, z))(z0))
    return z0, 1.0 / math.sqrt(curvature) if curvature > 0 else 1.0


def start_without_losses(
    model: Any, data: Any, absent: Sequence[str], fit_pooled: Callable[..., Any]
) -> PooledStart:
    """Start for data with no outcome below the reference point, where the loss-side
    parameters ``absent`` never enter the likelihood (estimation/loss_side.py): their
    posterior is their prior, independent of the rest. ML for the other parameters with
    these held at their start values; ``absent`` start at their default prior's median with
    that prior's curvature sd as jitter, and ML variance FLAT_VARIANCE (no curvature from
    the likelihood) with no covariance, so the Laplace mass matrix (H + P)^-1 gives them the
    prior's width. The note names them."""
    fixed = {name: model.spec(name).start for name in absent}
    note = (
        f"not identified by these data: {', '.join(absent)} (no outcome lies below the "
        "reference point, so they never enter the likelihood); their posterior is their "
        "prior (their rows in the table show the prior, not evidence)"
    )
    try:
        fit = fit_pooled(model, data, se="hessian", fixed=fixed, progress=False)
    except StopwiseInputError:
        raise
    except Exception as exc:  # the ML fit is only a starting point
        failed = f"pooled start: the ML fit failed ({type(exc).__name__}: {exc})"
        return PooledStart({}, None, None, [note, failed])
    priors = resolve_priors(model)
    names = list(model.param_names)
    free = [n for n in names if n not in absent]
    free_z = dict(zip(free, np.asarray(fit.z, np.float64)))
    coef, jitter = np.zeros(len(names)), np.zeros(len(names))
    cov = np.zeros((len(names), len(names)))
    for name in absent:
        i = names.index(name)
        coef[i], jitter[i] = prior_median_and_sd(priors[name], model.spec(name))
        cov[i, i] = FLAT_VARIANCE
    ml_cov = None if fit.cov_z is None else np.asarray(fit.cov_z, np.float64)
    rows = [names.index(n) for n in free]
    for n in free:
        coef[names.index(n)] = free_z[n]
    if ml_cov is None or not np.all(np.isfinite(ml_cov)):
        free_part = hessian_positive_part(fit)
        precision = None
        if free_part is not None:
            precision = np.diag(np.where(np.diag(cov) > 0, 1.0 / FLAT_VARIANCE, 0.0))
            precision[np.ix_(rows, rows)] = free_part
        return PooledStart(
            natural_intercepts(model, fit),
            coef,
            None,
            [note, FLAT_HESSIAN_NOTE],
            precision=precision,
            centre_start=partial(prior_centre, model),
        )
    cov[np.ix_(rows, rows)] = ml_cov
    jitter[rows] = np.sqrt(np.diag(ml_cov))
    natural = {n: float(model.spec(n).to_natural(coef[names.index(n)])) for n in names}
    return PooledStart(natural, coef, cov, [note], jitter)
