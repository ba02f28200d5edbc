"""Starting values and parametrisation of hierarchical Bayesian fits.

Per-subject maximum likelihood (estimation/ml/by_subject.py, one vmapped Newton run) gives each
subject s an unconstrained estimate a[s, k] with standard error se[s, k]. Subjects flagged as
unidentified (never draws, separation, estimate at a bound, indefinite Hessian, no
convergence) or with a non-finite estimate are left out of the summaries:

  mu_k          = median_s a[s, k]       (the pooled ML estimate or user values when given)
  spread_k      = 1.4826 * MAD_s a[s, k]  (normal-consistent median absolute deviation)
  between_k     = sqrt(max(spread_k^2 - median_s se[s, k]^2, 0))   (estimation noise removed)
  sd_k          = clip(between_k, SD_FLOOR, SD_CEILING)
  start[s, k]   = clip(a[s, k], mu_k - 3 sd_k, mu_k + 3 sd_k); unidentified subjects at mu_k
  Omega         = I

Parametrisation (Papaspiliopoulos, Roberts & Skold 2007; Betancourt & Girolami 2015): the
centred form (sample the subject's value z_s directly) suits a parameter whose per-subject
likelihood is informative relative to the population spread (its posterior is then nearly
independent of mu and sd); the non-centred form (sample a standard normal eta_s and set
z_s = mu + sd eta_s) suits a weakly identified one (the funnel between z_s and sd is then
removed). It is chosen per parameter (estimation/bayes/density.py, ``subject_offsets``). The rule
used for ``parametrisation="auto"``:

  ratio_k = median_s se[s, k] / between_k;   parameter k centred  iff  ratio_k < CENTRED_RATIO,

with CENTRED_RATIO = 0.5: a subject's data must pin its value down clearly more tightly
than the population spread (near ratio 1 the population sd may still approach 0, where the
centred form has a funnel; measured on demo data: benchmarks/bench_bayes.py docstring),

and, when fewer than half of the subjects give a finite standard error for parameter k,
centred iff the median subject has at least CENTRED_MIN_ROWS decisions (choices).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from numpyro.distributions.transforms import biject_to
from numpyro.infer import init_to_uniform

from stopwise.estimation.cells import subject_labels

SD_FLOOR = 0.05  # smallest starting population sd (unconstrained scale)
SD_CEILING = 2.0  # largest starting population sd
SUBJECT_CLIP = 3.0  # subject starts within mu +- SUBJECT_CLIP * sd
CENTRED_RATIO = 0.5  # centred when median se / between-subject sd is below this
CENTRED_MIN_ROWS = 100  # fallback rule: centred with at least this many rows per subject
PARAMETRISATIONS = ("auto", "centred", "noncentred")


@dataclass(frozen=True)
class SubjectStart:
    """Unconstrained starting values: mu (K,), sd (K,), subject values (n, K), and the
    evidence for the parametrisation rule."""

    mu: np.ndarray
    sd: np.ndarray
    subject_z: np.ndarray
    ratio: np.ndarray  # median se / sd per parameter (NaN where too few SEs)
    n_identified: int
    note: str
    subject_se: np.ndarray | None = None  # (n, K) ML standard errors, NaN where unknown
    subject_cov: np.ndarray | None = None  # (n, K, K) ML covariances of z, NaN where unknown
    absent: tuple[int, ...] = ()  # parameters that never enter the likelihood (non-centred)
    prior_var: np.ndarray | None = None  # (K,) their prior's unconstrained variance, else NaN


def robust_spread(values: np.ndarray) -> float:
    """1.4826 * median |x - median x| (the normal-consistent MAD); NaN when empty."""
    if values.size == 0:
        return math.nan
    return float(1.4826 * np.median(np.abs(values - np.median(values))))


def summarise_subject_fits(
    z: np.ndarray,
    se: np.ndarray,
    identified: np.ndarray,
    mu: np.ndarray | None = None,
    cov: np.ndarray | None = None,
) -> SubjectStart:
    """The start values of the module docstring from per-subject estimates z (n, K), their
    standard errors se (n, K), a per-subject identified flag (n,) and optionally the full ML
    covariances (n, K, K), kept for identified subjects (estimation/bayes/whiten.py)."""
    z = np.asarray(z, np.float64)
    se = np.asarray(se, np.float64)
    ok = np.asarray(identified, bool) & np.all(np.isfinite(z), axis=1)
    n, k = z.shape
    good = z[ok]
    if mu is None:
        mu = np.median(good, axis=0) if len(good) else np.zeros(k)
    mu = np.asarray(mu, np.float64)
    spread = np.array([robust_spread(good[:, j]) for j in range(k)]) if len(good) else None
    ratio = np.full(k, np.nan)
    between = np.full(k, 0.3) if spread is None else np.nan_to_num(spread, nan=0.3)
    for j in range(k):
        finite = se[ok, j][np.isfinite(se[ok, j])]
        if len(finite) >= max(1, n // 2) and spread is not None:
            noise = float(np.median(finite))
            between[j] = math.sqrt(max(between[j] ** 2 - noise**2, 0.0))
            ratio[j] = noise / between[j] if between[j] > 0 else math.inf
    sd = np.clip(between, SD_FLOOR, SD_CEILING)
    start = np.where(ok[:, None], np.clip(z, mu - SUBJECT_CLIP * sd, mu + SUBJECT_CLIP * sd), mu)
    note = (
        f"hierarchical start: per-subject ML fits ({int(ok.sum())} of {n} subjects identified); "
        "population sd from their spread (MAD less estimation noise)"
    )
    se_start = np.where(ok[:, None] & np.isfinite(se), se, np.nan)
    cov_start = None if cov is None else np.where(ok[:, None, None], cov, np.nan)
    return SubjectStart(mu, sd, start, ratio, int(ok.sum()), note, se_start, cov_start)


@dataclass(frozen=True)
class StartVariances:
    """Rough posterior variances on the sampler's unconstrained scale at the start."""

    subject: np.ndarray  # (n, K) of a subject's z_sk
    intercept: np.ndarray  # (K,) of mu_k
    log_sd: np.ndarray  # (K,) of log sd_k
    correlation: float  # of each unconstrained correlation coordinate
    n: int  # subjects the population figures are based on


def start_variances(start: SubjectStart) -> StartVariances:
    """Normal approximations to the posterior variances, NUTS's initial (inverse) mass
    matrix, so the first warm-up window does not explore with the identity (measured on the
    120 demo subjects: 250 leapfrog steps per warm-up draw with the identity):

      subject[s, k] = 1 / (1/se_sk^2 + 1/sd_k^2)    (sd_k^2 where se_sk is unknown)
      intercept_k   = (sd_k^2 + median_s se_sk^2) / n
      log_sd_k      = min((1 + ratio_k^2)^2 / (2 n), 1)   (delta method for log of a sd
                                                           estimated with noise; ratio 1
                                                           where unknown)
      correlation   = min(1 / n, 1)                       (atanh of a sample correlation)

    with n the number of identified subjects (at least 2)."""
    sd = np.asarray(start.sd, np.float64)
    n_sub, k = np.shape(start.subject_z)
    se = start.subject_se if start.subject_se is not None else np.full((n_sub, k), np.nan)
    se = np.asarray(se, np.float64)
    subject = np.where(np.isfinite(se) & (se > 0), 1.0 / (1.0 / se**2 + 1.0 / sd**2), sd**2)
    n = max(int(start.n_identified), 2)
    noise = np.array(
        [np.median(c[np.isfinite(c)]) ** 2 if np.isfinite(c).any() else 0.0 for c in se.T]
    )
    ratio = np.nan_to_num(np.asarray(start.ratio, np.float64), nan=1.0, posinf=1.0)
    intercept = (sd**2 + noise) / n
    log_sd = np.minimum((1.0 + ratio**2) ** 2 / (2.0 * n), 1.0)
    for j in start.absent:  # prior only: the prior's width (log HalfNormal: about 1)
        intercept[j] = float(start.prior_var[j]) if start.prior_var is not None else 1.0
        log_sd[j] = 1.0
    return StartVariances(
        subject=subject,
        intercept=intercept,
        log_sd=log_sd,
        correlation=min(1.0 / n, 1.0),
        n=n,
    )


def choose_parametrisation(
    choice: str, start: SubjectStart, rows_per_subject: float
) -> tuple[bool, ...]:
    """Per parameter: centred (True) or non-centred (False), by the rule of the module
    docstring for "auto", or all as chosen ("centred" / "noncentred")."""
    k = len(start.mu)
    if choice in ("centred", "noncentred"):
        return (choice == "centred",) * k
    if choice != "auto":
        raise ValueError(f"parametrisation {choice!r}: expected one of {PARAMETRISATIONS}")
    fallback = rows_per_subject >= CENTRED_MIN_ROWS
    return tuple(
        bool(r < CENTRED_RATIO) if not math.isnan(r) else fallback and j not in start.absent
        for j, r in enumerate(np.asarray(start.ratio, float))
    )


def describe_parametrisation(names: tuple[str, ...], centred: tuple[bool, ...]) -> str:
    """'centred', 'non-centred' or e.g. 'centred: r; non-centred: precision'."""
    if all(centred):
        return "centred"
    if not any(centred):
        return "non-centred"
    yes = ", ".join(n for n, c in zip(names, centred) if c)
    no = ", ".join(n for n, c in zip(names, centred) if not c)
    return f"centred: {yes}; non-centred: {no}"


def per_subject_estimates(
    model: Any, data: Any, fit_by_subject: Callable[..., Any]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-subject ML: unconstrained estimates (n, K), standard errors (n, K) and an
    identified flag (n,), in subject-index order, from ``fit_by_subject`` (the caller's
    PointFits.by_subject, estimation/point_fits.py)."""
    z, se, _cov, identified = per_subject_fits(model, data, fit_by_subject)
    return z, se, identified


def per_subject_fits(
    model: Any,
    data: Any,
    fit_by_subject: Callable[..., Any],
    fixed: Mapping[str, float] | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``per_subject_estimates`` plus each subject's ML covariance of z (n, K, K), NaN
    where the Hessian gave none. ``fixed`` parameters are held at the given natural values
    in the fits; their columns hold z of that value, se and covariance NaN."""
    fixed = dict(fixed or {})
    fits = fit_by_subject(model, data, se="hessian", **({"fixed": fixed} if fixed else {}))
    labels = list(subject_labels(data))
    n, k = len(labels), len(model.param_names)
    free = [j for j, name in enumerate(model.param_names) if name not in fixed]
    z = np.full((n, k), np.nan)
    se = np.full((n, k), np.nan)
    cov = np.full((n, k, k), np.nan)
    identified = np.zeros(n, bool)
    for j, spec in enumerate(model.params):
        if spec.name in fixed:
            z[:, j] = float(spec.to_unconstrained(fixed[spec.name]))
    for label, fit in fits.fits:
        s = labels.index(label)
        z[s, free] = np.asarray(fit.z, np.float64)[: len(free)]
        if fit.cov_z is not None:
            cov[s][np.ix_(free, free)] = np.asarray(fit.cov_z, np.float64)[: len(free), : len(free)]
            se[s] = np.sqrt(np.clip(np.diag(cov[s]), 0.0, None))
        identified[s] = fit.converged and not fits.flags.get(label)
    return z, se, cov, identified


def init_near(
    site: Any = None,
    values: Mapping[str, Any] | None = None,
    radius: float = 0.5,
    jitter: float = 0.1,
    scales: Mapping[str, Any] | None = None,
) -> Any:
    """NumPyro init strategy: named sites at ``values`` (constrained scale) moved by
    Uniform(-1, 1) * scale on their unconstrained scale (so chains start apart but near;
    scale = ``scales[name]``, broadcast over the site, else ``jitter``), other sites
    Uniform(-radius, radius) on the unconstrained scale."""
    if site is None:
        return partial(
            init_near,
            values=dict(values or {}),
            radius=radius,
            jitter=jitter,
            scales=dict(scales or {}),
        )
    if site["type"] == "sample" and not site["is_observed"] and site["name"] in (values or {}):
        key = site["kwargs"].get("rng_key")
        shape = site["kwargs"].get("sample_shape", ())
        transform = biject_to(site["fn"].support)
        free = transform.inv(jnp.asarray(values[site["name"]], jnp.float64))
        scale = jnp.asarray((scales or {}).get(site["name"], jitter), jnp.float64)
        step = jax.random.uniform(key, shape + free.shape, minval=-1.0, maxval=1.0)
        return transform(free + scale * step)
    return init_to_uniform(site, radius=radius)
