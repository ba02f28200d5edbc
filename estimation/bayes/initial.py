"""Where the chains start: initial site values, their jitter and NUTS's initial inverse
mass matrix.

Pooled fits (init None or "mle") start at the ML estimate with the Laplace covariance of the
posterior as the dense inverse mass matrix the warm-up starts from and then adapts, like the
step size (estimation/bayes/pooled_start.py, estimation/bayes/sampler.py). Hierarchical fits start near per-subject ML estimates
(estimation/bayes/subject_start.py) and use a dense mass matrix for the population sites
(intercepts, effects, sd_z, L_corr; ``dense_mass``) and a diagonal one for the subject sites;
the warm-up starts from an inverse mass matrix of normal-approximation posterior variances
built from the per-subject standard errors (``initial_inverse_mass``) rather than the
identity.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.density import (
    CellArgs,
    Setup,
    population_sites,
)
from stopwise.estimation.bayes.pooled_start import prior_median_and_sd
from stopwise.estimation.bayes.priors import HYPER_SD_SCALE, resolve_priors
from stopwise.estimation.bayes.subject_start import (
    SubjectStart,
    per_subject_fits,
    start_variances,
    summarise_subject_fits,
)
from stopwise.estimation.point_fits import PointFits, require_point_fits
from stopwise.models.base import Model

# ---------------------------------------------------------------------------------------
# Initial values.


def initial_natural(
    model: Model,
    data: Any,
    init: Any,
    formulas: Any,
    notes: list[str],
    point_fits: PointFits | None = None,
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
        natural.update(mle_estimates(model, data, formulas, notes, point_fits))
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


HALF_NORMAL_MEDIAN = 0.6745  # median of HalfNormal(1): Phi^-1(3/4), a fact of the trade

CONTEST_HIERARCHY_COST = (
    "hierarchical contest model: every gradient solves one equilibrium per subject (measured "
    "on 16 demo subjects, crra+qre with max_target 30: 0.26 s per gradient against 16 ms "
    "pooled), so a full run can take hours; a pooled fit or a smaller max_target is much "
    "faster"
)


def hierarchical_start(
    model: Model,
    data: Any,
    mu_natural: Mapping[str, float] | None,
    notes: list[str],
    point_fits: PointFits | None,
    absent: tuple[str, ...] = (),
) -> SubjectStart:
    """Population and subject starting values from per-subject ML fits
    (estimation/bayes/subject_start.py); ``mu_natural`` (pooled ML or user values) replaces the
    median of the subjects as the population location when given. Contest models skip the
    per-subject fits: every subject starts at the pooled ML estimate (or ``mu_natural``).
    ``absent``: parameters that never enter the likelihood (gains-only data,
    estimation/loss_side.py): held at their start values in the per-subject fits, then
    started from their priors (``start_from_prior``)."""
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
            fits = require_point_fits(point_fits, "a hierarchical contest fit's start")
            pooled = {**model.start_theta(), **mle_estimates(model, data, None, notes, fits)}
            mu = np.array([float(s.to_unconstrained(pooled[s.name])) for s in model.params])
        start = summarise_subject_fits(
            np.tile(mu, (n, 1)), np.full((n, k), np.nan), np.zeros(n, bool), mu
        )
        notes.append(
            "hierarchical start (contest model): every subject at the pooled ML estimate, "
            f"population sd {start.sd[0]:g} on the unconstrained scale (no per-subject fits)"
        )
        return start
    fits = require_point_fits(point_fits, "a hierarchical fit's start")
    try:
        fixed = {name: model.spec(name).start for name in absent}
        z, se, cov, identified = per_subject_fits(model, data, fits.by_subject, fixed)
    except StopwiseInputError:
        raise
    except Exception as exc:  # the per-subject fits are only a starting point
        notes.append(
            f"hierarchical start: the per-subject ML fits failed ({type(exc).__name__}: {exc}); "
            "subjects start at the population location with sd 0.3"
        )
        z, se, identified = np.zeros((n, k)), np.full((n, k), np.nan), np.zeros(n, bool)
        cov = None
    if mu is None and not np.any(identified):  # no subject to summarise: the model's starts
        mu = np.array([float(s.to_unconstrained(s.start)) for s in model.params])
    start = summarise_subject_fits(z, se, identified, mu, cov)
    notes.append(start.note)
    return start_from_prior(model, start, absent) if absent else start


def start_from_prior(model: Model, start: SubjectStart, absent: tuple[str, ...]) -> SubjectStart:
    """Parameters that never enter the likelihood have the prior as posterior: mu_k at
    the prior's unconstrained median, sd_k at the median of HalfNormal(HYPER_SD_SCALE)
    (0.6745 x scale), every subject at mu_k (eta = 0), the intercept's initial variance
    the prior's curvature variance; sampled non-centred (no funnel between eta and sd)."""
    priors = resolve_priors(model)
    mu, sd = start.mu.copy(), start.sd.copy()
    subject_z, ratio = start.subject_z.copy(), start.ratio.copy()
    prior_var = np.full(len(mu), np.nan)
    index = [model.param_names.index(name) for name in absent]
    for j, name in zip(index, absent):
        median, width = prior_median_and_sd(priors[name], model.spec(name))
        mu[j], sd[j], prior_var[j] = median, HALF_NORMAL_MEDIAN * HYPER_SD_SCALE, width**2
        subject_z[:, j], ratio[j] = median, np.nan
    return replace(
        start,
        mu=mu,
        sd=sd,
        subject_z=subject_z,
        ratio=ratio,
        absent=tuple(index),
        prior_var=prior_var,
    )


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


def mle_estimates(
    model: Model, data: Any, formulas: Any, notes: list[str], point_fits: PointFits | None
) -> dict[str, float]:
    """Natural-scale ML estimates of the parameters (intercepts), or {} with a note."""
    fit_pooled = require_point_fits(point_fits, "init='mle'").pooled
    try:
        fit = fit_pooled(model, data, se=None, formulas=formulas)
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
