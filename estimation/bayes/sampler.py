"""The sampler run: NumPyro's NUTS on the CPU, and the pointwise log-likelihood after it.

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

import warnings
from collections.abc import Mapping
from functools import partial
from typing import Any

import jax
import numpy as np
import numpyro
import numpyro.infer.mcmc as numpyro_mcmc
import numpyro.util
from numpyro.infer import MCMC, NUTS

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.density import (
    CellArgs,
    Setup,
    numpyro_model,
    population_sites,
    row_loglik,
)
from stopwise.estimation.bayes.draws import flatten_chains, map_draws
from stopwise.estimation.bayes.subject_start import (
    init_near,
)

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


def mass_matrix_settings(
    setup: Setup,
    dense_mass: bool,
    inverse_mass: Mapping[tuple[str, ...], Any] | None,
) -> dict[str, Any]:
    """NumPyro's mass-matrix keywords (the same names for ``NUTS`` and ``hmc``'s init kernel):
    one dense block for the population sites when ``dense_mass``, the initial inverse mass
    M0^-1 by site blocks (identity if None), always adapted in the warm-up.

    NumPyro 0.22's windowed adaptation (infer/hmc_util.py, ``warmup_adapter``): M0^-1 is used
    in the initial buffer and the first window (iterations 0-99 of a 500-step warm-up, 0-99
    of 200); at the end of each window it is replaced by the Welford covariance C of that
    window's draws alone, regularised as (n / (n + 5)) C + 1e-3 (5 / (n + 5)) I; the matrix
    sampled with is the last middle window's (draws 250-449 of a 500-step warm-up, 100-149 of
    200). So a pooled fit starts with the Laplace matrix (H + P)^-1 (good where the posterior
    is near normal) and ends with the covariance its own draws measured (issue 16 item 1:
    "adapted during warm-up"; a fixed Laplace matrix diverged on small, non-normal posteriors).
    """
    return {
        "dense_mass": [population_sites(setup)] if dense_mass else False,
        "inverse_mass_matrix": None if inverse_mass is None else dict(inverse_mass),
        "adapt_mass_matrix": True,
    }


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
) -> MCMC:
    """NUTS with ``chains`` chains of ``warmup`` adaptation + ``draws`` kept iterations;
    ``dense_mass``: one dense mass-matrix block for the population sites, diagonal elsewhere;
    ``inverse_mass``: the initial inverse mass matrix by site blocks (identity if None),
    re-estimated from the warm-up draws like the step size (``mass_matrix_settings``)."""
    kernel = NUTS(
        partial(numpyro_model, setup),
        target_accept_prob=target_accept,
        max_tree_depth=max_tree_depth,
        init_strategy=init_near(values=init_values, scales=init_scales),
        **mass_matrix_settings(setup, dense_mass, inverse_mass),
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
