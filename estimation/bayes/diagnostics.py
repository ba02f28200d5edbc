"""Convergence and data-fit checks of a Bayesian fit: R-hat, effective sample sizes,
divergences, E-BFMI, tree-depth hits and impossible observations, each turned into a warning
when it fails its threshold (the sources stand beside the thresholds)."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

RHAT_MAX = 1.01  # Vehtari et al. 2021 recommend R-hat < 1.01
ESS_MIN = 400  # Vehtari et al. 2021: bulk and tail ESS > 400 (100 per chain with 4 chains)
EBFMI_MIN = 0.3  # Betancourt 2016: E-BFMI below 0.3 signals poor exploration
PARETO_K_MAX = 0.7  # Vehtari et al. 2017/2024: k > 0.7 makes the PSIS estimate unreliable


# ---------------------------------------------------------------------------------------
# Diagnostics and warnings.


def diagnostics_table(idata: Any, var_names: Sequence[str]) -> pd.DataFrame:
    """R-hat (rank-normalised), bulk and tail ESS for every scalar element of ``var_names``."""
    table = az.summary(idata, var_names=list(var_names), kind="diagnostics")
    return table[["r_hat", "ess_bulk", "ess_tail"]]


def sampler_warnings(
    diag: pd.DataFrame, stats: Mapping[str, np.ndarray], ebfmi: np.ndarray, max_tree_depth: int
) -> list[str]:
    """One warning per problem, naming the worst quantities and what to try."""
    out: list[str] = []
    if not np.any(np.isfinite(diag["r_hat"].to_numpy(dtype=float))):
        out.append(
            "R-hat cannot be computed (one chain, or draws that never changed): convergence "
            "is not checked; run at least 2 chains (4 recommended)"
        )
    bad = diag[diag["r_hat"] > RHAT_MAX].sort_values("r_hat", ascending=False)
    if len(bad):
        out.append(
            f"R-hat above {RHAT_MAX} for {_worst(bad, 'r_hat')}: the chains disagree; run "
            "longer (more warmup and draws), start from init='mle', or check that the "
            "parameter is identified by the design"
        )
    for column, what in (("ess_bulk", "bulk"), ("ess_tail", "tail")):
        low = diag[diag[column] < ESS_MIN].sort_values(column)
        if len(low):
            out.append(
                f"{what} ESS below {ESS_MIN} for {_worst(low, column)}: too few effective "
                "draws for stable means and intervals; increase draws (or chains)"
            )
    n_div = int(np.sum(stats["diverging"]))
    if n_div:
        out.append(
            f"{n_div} divergent transitions after warm-up: the posterior has regions NUTS "
            "cannot explore; raise target_accept (e.g. 0.95), give tighter priors, or use a "
            "pooled model if a between-subject sd is near zero"
        )
    for chain, value in enumerate(np.atleast_1d(ebfmi)):
        if value < EBFMI_MIN:
            out.append(
                f"E-BFMI {value:.2f} below {EBFMI_MIN} in chain {chain}: the momentum resampling "
                "explores the energy poorly (often heavy tails or a funnel); try longer warm-up "
                "or tighter priors on the between-subject sds"
            )
    hits = int(np.sum(stats["reached_max_treedepth"]))
    if hits:
        out.append(
            f"{hits} transitions hit the maximum tree depth {max_tree_depth}: sampling is "
            "inefficient (strongly correlated or badly scaled parameters); raise "
            "max_tree_depth or reparameterise"
        )
    return out


IMPOSSIBLE_LOGLIK = -1e10  # a log-likelihood this low means "zero probability" in practice


def data_fit_warnings(loglik: float, pointwise_ll: np.ndarray, params: pd.DataFrame) -> list[str]:
    """Observations the model cannot produce, and chains that never moved."""
    out = []
    worst = np.min(pointwise_ll, axis=0)
    bad = int(np.sum(~np.isfinite(worst) | (worst < IMPOSSIBLE_LOGLIK)))
    if bad or not math.isfinite(loglik) or loglik < IMPOSSIBLE_LOGLIK:
        out.append(
            f"{bad} pointwise units have (near) zero probability under the model for some "
            f"draws (log-likelihood at the posterior mean {loglik:.3g}): the model cannot "
            "produce some observed choices (e.g. CRRA utility of losses or of a zero bank at "
            "r >= 1); the posterior is not trustworthy -- choose a model that covers the data"
        )
    scale = np.maximum(1.0, np.abs(params["estimate"].to_numpy()))
    stuck = [n for n, sd, m in zip(params.index, params["se"], scale) if not sd > 1e-12 * m]
    if stuck:
        out.append(
            f"the draws of {', '.join(stuck)} never changed: the sampler did not move "
            "(too short a warm-up, or a likelihood without finite gradients)"
        )
    return out


def _nan_extreme(reduce: Any, values: Any) -> float:
    """reduce (np.nanmax / np.nanmin) over the finite values, NaN when there are none."""
    values = np.asarray(values, dtype=float)
    return float(reduce(values)) if np.any(np.isfinite(values)) else math.nan


def _worst(frame: pd.DataFrame, column: str, n: int = 3) -> str:
    items = [f"{name} ({value:.3g})" for name, value in frame[column].head(n).items()]
    more = f" and {len(frame) - n} more" if len(frame) > n else ""
    return ", ".join(items) + more
