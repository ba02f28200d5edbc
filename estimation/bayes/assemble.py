"""Assembly of a ``Posterior`` (estimation/bayes/posterior.py) from the sampler's draws:
the InferenceData, the population and subject tables (estimate = posterior mean, se =
posterior sd, the highest-density interval of probability ``hdi_prob``), diagnostics and
warnings."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

from stopwise.estimation.bayes import labels as bayes_labels
from stopwise.estimation.bayes.diagnostics import (
    _nan_extreme,
    data_fit_warnings,
    diagnostics_table,
    sampler_warnings,
)
from stopwise.estimation.bayes.draws import flatten_chains
from stopwise.estimation.bayes.posterior import Posterior
from stopwise.estimation.bayes.priors import hyperprior_text
from stopwise.estimation.bayes.reported_draws import (
    derived_draws,
    loglik_at_posterior_mean,
    observed_data,
    sample_stats,
)
from stopwise.estimation.bayes.truncation import truncation_warnings


def build_posterior(
    *,
    setup: Any,
    data: Any,
    args: Any,
    cells: Any,
    samples: Mapping[str, Any],
    extra: Mapping[str, Any],
    pointwise_ll: np.ndarray,
    unit_labels: np.ndarray,
    unit_name: str,
    run: dict[str, Any],
    hdi_prob: float,
    notes: list[str],
) -> Posterior:
    """Assemble the InferenceData, the reported table, diagnostics and warnings."""
    chains, draws = np.asarray(next(iter(samples.values()))).shape[:2]
    subjects = (
        np.asarray(data.subject_labels)
        if data.subject_labels is not None
        else np.arange(data.n_subjects)
    )
    first_cell = None
    if setup.hierarchical:
        cell_subject = np.asarray(args.cell_subject)
        first_cell = np.array(
            [int(np.flatnonzero(cell_subject == s)[0]) for s in range(setup.n_subjects)]
        )
    derived = derived_draws(setup, samples, args, first_cell)
    subject_vars = [k for k in derived if k.endswith("_subject")]
    population_vars = [k for k in derived if k not in subject_vars]
    coords = {"subject": subjects, unit_name: unit_labels}
    dims = {k: ["subject"] for k in subject_vars}
    dims["obs"] = [unit_name]
    idata = az.from_dict(
        posterior=derived,
        log_likelihood={"obs": pointwise_ll.reshape(chains, draws, -1)},
        observed_data=observed_data(data),
        sample_stats=sample_stats(extra, run["max_tree_depth"]),
        coords=coords,
        dims=dims,
    )
    diag = diagnostics_table(idata, list(derived))
    stats = sample_stats(extra, run["max_tree_depth"])
    ebfmi = np.atleast_1d(az.bfmi(idata))
    params = population_table(idata, population_vars, diag, hdi_prob)
    subject_params = (
        subject_table(idata, subject_vars, diag, hdi_prob, subjects) if subject_vars else None
    )
    diagnostics = {
        "divergences": int(np.sum(stats["diverging"])),
        "max_rhat": _nan_extreme(np.nanmax, diag["r_hat"]),
        "min_ess_bulk": float(np.nanmin(diag["ess_bulk"])),
        "min_ess_tail": float(np.nanmin(diag["ess_tail"])),
        "ebfmi": [float(v) for v in ebfmi],
        "max_treedepth_hits": int(np.sum(stats["reached_max_treedepth"])),
        "mean_step_size": float(np.mean(stats["step_size"])),
        "mean_accept": float(np.mean(stats["acceptance_rate"])),
        "ess_bulk_per_second": float(
            np.nanmin(diag["ess_bulk"]) / max(run["sampling_seconds"], 1e-9)
        ),
        "quantities_checked": len(diag),
    }
    warnings_ = sampler_warnings(diag, stats, ebfmi, run["max_tree_depth"])
    priors = {name: p.text for name, p in setup.priors.items()}
    hyper = hyperprior_text()
    if setup.hierarchical:
        priors.update(
            {
                "population median": hyper["location"],
                "between-subject sd (unconstrained scale)": hyper["sd"],
                "between-subject correlation (unconstrained scale)": hyper["correlation"],
            }
        )
    if any(setup.effect_columns(n) for n in setup.names):
        priors["covariate effects"] = hyper["covariate effects"]
    loglik = loglik_at_posterior_mean(setup, samples, args)
    warnings_ += data_fit_warnings(loglik, pointwise_ll, params)
    warnings_ += truncation_warnings(run.get("truncation_check"))
    flat_samples = flatten_chains(samples)
    post = Posterior(
        model=setup.model,
        idata=idata,
        params=params,
        subject_params=subject_params,
        diagnostics=diagnostics,
        warnings=warnings_,
        run=run,
        priors=priors,
        hierarchical=setup.hierarchical,
        hdi_prob=hdi_prob,
        n_obs=int(data.n_obs),
        n_subjects=int(data.n_subjects),
        loglik=loglik,
        unit_name=unit_name,
        notes=notes,
        setup=setup,
        args=args,
        cells=cells,
        data=data,
    )
    post._samples = flat_samples
    return post


def _hdi(values: np.ndarray, prob: float) -> tuple[float, float]:
    lo, hi = az.hdi(np.asarray(values).reshape(-1), hdi_prob=prob)
    return float(lo), float(hi)


def population_table(
    idata: Any, names: Sequence[str], diag: pd.DataFrame, hdi_prob: float
) -> pd.DataFrame:
    rows = []
    for name in names:
        v = np.asarray(idata.posterior[name].values)
        lo, hi = _hdi(v, hdi_prob)
        rows.append(
            {
                "name": name,
                "estimate": float(v.mean()),
                "se": float(v.std(ddof=1)),
                "ci_low": lo,
                "ci_high": hi,
                "r_hat": float(diag.loc[name, "r_hat"]),
                "ess_bulk": float(diag.loc[name, "ess_bulk"]),
                "ess_tail": float(diag.loc[name, "ess_tail"]),
                "scale": bayes_labels.scale_of(name),
            }
        )
    return pd.DataFrame(rows).set_index("name")


def subject_table(
    idata: Any, names: Sequence[str], diag: pd.DataFrame, hdi_prob: float, subjects: np.ndarray
) -> pd.DataFrame:
    """Long frame: subject, param, estimate (posterior mean), se (sd), HDI, R-hat, ESS."""
    rows = []
    for name in names:
        v = np.asarray(idata.posterior[name].values)  # (chains, draws, n_subjects)
        flat = v.reshape(-1, v.shape[-1])
        for s, label in enumerate(subjects):
            lo, hi = _hdi(flat[:, s], hdi_prob)
            key = f"{name}[{label}]"
            rows.append(
                {
                    "subject": label,
                    "param": name.removesuffix("_subject"),
                    "estimate": float(flat[:, s].mean()),
                    "se": float(flat[:, s].std(ddof=1)),
                    "ci_low": lo,
                    "ci_high": hi,
                    "r_hat": float(diag.loc[key, "r_hat"]) if key in diag.index else np.nan,
                    "ess_bulk": float(diag.loc[key, "ess_bulk"]) if key in diag.index else np.nan,
                }
            )
    return pd.DataFrame(rows)
