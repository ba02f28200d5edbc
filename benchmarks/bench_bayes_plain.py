"""Hierarchical crra+planner+logit: stopwise's engine against a plain NumPyro model of the
same likelihood written the obvious way, in the same run (issue 16, item 6).

The plain model: population location mu_k (the engine's natural-scale priors through the
transform), between-subject sd_k ~ HalfNormal(1), subjects centred z_sk ~ Normal(mu_k,
sd_k) (no correlation), and the log-likelihood of every data row evaluated on its own,
jax.vmap of ``loglik_obs`` over rows with each row's subject parameters, NUTS with NumPyro's
defaults (diagonal mass matrix from the identity, init_to_uniform). The engine: fit_bayes
with its defaults (per-subject ML start, dense population mass matrix, aggregated rows).
The figure of merit is min bulk ESS per second of NUTS (warm-up + sampling, compilation
included) over the population quantities both report (median, between-subject sd).

Run ``python -m benchmarks.run bench_bayes_plain`` (SUBJECTS, CHAINS, DRAWS below; the
reduced size is what the shared 2-core machine allows, the issue's full size is 120 demo
subjects at min bulk ESS >= 400).
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import replace
from typing import Any

import arviz as az
import jax
import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist
from numpyro.infer import MCMC, NUTS

import stopwise  # noqa: F401  (float64 before any JAX use)
from benchmarks.bench_bayes import demo_solo_bundle
from stopwise.data_schemas.arrays import STOPPING_ROW_FIELDS
from stopwise.estimation.bayes import fit as bayes
from stopwise.estimation.bayes import sampler
from stopwise.estimation.bayes.loo_subject import without_subjects
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.bayes.truncation import auto_capped
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.models.spec import build_model

SPEC = "crra+planner+logit"
SUBJECTS = int(os.environ.get("BENCH_PLAIN_SUBJECTS", "12"))
CHAINS, DRAWS, WARMUP = 2, 300, 300


def plain_model(model: Any, priors: Any, data: Any, n_subjects: int) -> None:
    """The obvious hierarchical model (module docstring)."""
    z_subject = []
    for spec in model.params:
        mu = numpyro.sample(f"mu_{spec.name}", dist.ImproperUniform(dist.constraints.real, (), ()))
        numpyro.factor(f"prior_{spec.name}", priors[spec.name].log_density_unconstrained(spec, mu))
        sd = numpyro.sample(f"sd_{spec.name}", dist.HalfNormal(1.0))
        with numpyro.plate("subjects", n_subjects):
            z_subject.append(numpyro.sample(f"z_{spec.name}", dist.Normal(mu, sd)))
    row_subject = jnp.asarray(data.subject)
    theta = {s.name: s.to_natural(z[row_subject]) for s, z in zip(model.params, z_subject)}
    axes = replace(
        jax.tree_util.tree_map(lambda _: None, data), **dict.fromkeys(STOPPING_ROW_FIELDS, 0)
    )
    one_row = jax.vmap(model.loglik_obs, in_axes=(0, axes))
    numpyro.factor("loglik", jnp.sum(one_row(theta, data)))


def plain_fit(model: Any, data: Any) -> tuple[float, float]:
    """(min bulk ESS over mu and sd, seconds of NUTS)."""
    priors = resolve_priors(model)
    kernel = NUTS(plain_model)
    mcmc = MCMC(
        kernel,
        num_warmup=WARMUP,
        num_samples=DRAWS,
        num_chains=CHAINS,
        chain_method="vectorized",
        progress_bar=False,
    )
    bare = replace(data, covariates={})
    t0 = time.perf_counter()
    mcmc.run(jax.random.PRNGKey(0), model, priors, bare, int(data.n_subjects))
    samples = mcmc.get_samples(group_by_chain=True)
    jax.block_until_ready(samples)
    seconds = time.perf_counter() - t0
    keep = {k: np.asarray(v) for k, v in samples.items() if k.startswith(("mu_", "sd_"))}
    ess = az.ess(az.from_dict(posterior=keep), method="bulk")
    sampler.release_compiled_programs()
    return float(min(float(ess[k]) for k in keep)), seconds


def engine_fit(model: Any, data: Any) -> tuple[float, float]:
    post = bayes.fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=CHAINS,
        draws=DRAWS,
        warmup=WARMUP,
        seed=0,
        progress=False,
        loo="trial",
        point_fits=ML_POINT_FITS,
    )
    rows = [
        r
        for r in post.params.index
        if r.endswith(("population median", "between-subject sd (unconstrained scale)"))
    ]
    return float(post.params.loc[rows, "ess_bulk"].min()), float(post.run["sampling_seconds"])


def main() -> str:
    full = demo_solo_bundle()
    codes = np.unique(np.asarray(full.subject))
    data = without_subjects(full, codes[SUBJECTS:])
    model = build_model(SPEC)
    capped = auto_capped(model, data) or model  # both at the engine's automatic cap
    load0 = os.getloadavg()[0]
    ess_e, sec_e = engine_fit(capped, data)
    ess_p, sec_p = plain_fit(capped, data)
    load1 = os.getloadavg()[0]
    rate_e, rate_p = ess_e / sec_e, ess_p / sec_p
    return (
        "## Bayes: hierarchical engine against a plain NumPyro model (issue 16)\n\n"
        f"{SPEC} on the solo trials of the first {SUBJECTS} demo subjects ({data.n_obs} "
        f"decisions), {CHAINS} chains x {DRAWS} draws after {WARMUP} warm-up, both at the "
        f"automatic planner cap max_target={capped.options.get('max_target')}. Load average "
        f"(1 min) before / after: {load0:.1f} / {load1:.1f} (shared machine).\n\n"
        "| fit | min bulk ESS (population median, between-subject sd) | NUTS seconds | "
        "min bulk ESS per second |\n|---|---|---|---|\n"
        f"| stopwise engine | {ess_e:.0f} | {sec_e:.0f} | {rate_e:.2f} |\n"
        f"| plain per-row NumPyro model | {ess_p:.0f} | {sec_p:.0f} | {rate_p:.3f} |\n\n"
        f"Ratio of min bulk ESS per second, engine / plain: {rate_e / max(rate_p, 1e-12):.1f}."
    )


if __name__ == "__main__":
    print(main())
    sys.exit(0)
