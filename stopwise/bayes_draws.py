"""What a saved Bayesian fit keeps of its posterior draws, so that a report can draw its
rank plots and densities from the JSON file alone.

The full draws are large (chains x draws x every subject-level value), so the JSON keeps,
for each scalar population parameter, every s-th draw of every chain with
s = ceil(draws / MAX_KEPT_PER_CHAIN): at most MAX_KEPT_PER_CHAIN per chain, in sampling
order, chains kept apart. Thinning a chain keeps its rank statistics' uniformity when the
chains mix (a rank plot of thinned draws is a rank plot of a shorter run), and every kept
value is a posterior draw, so a density of them estimates the posterior density. The
record states s and the draws per chain; the report says that its figures use thinned
draws. Written with the result JSON (atomically, no pickle).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

MAX_KEPT_PER_CHAIN = 250
KEY = "thinned_draws"


def thinning_step(draws: int, keep: int = MAX_KEPT_PER_CHAIN) -> int:
    """s = ceil(draws / keep), at least 1."""
    return max(1, math.ceil(int(draws) / int(keep)))


def thin_chains(values: np.ndarray, keep: int = MAX_KEPT_PER_CHAIN) -> np.ndarray:
    """Every s-th draw of each chain (rows = chains), starting at the first draw."""
    array = np.asarray(values, dtype=float)
    return array[:, :: thinning_step(array.shape[1], keep)]


def population_names(result: Any) -> list[str]:
    """The reported parameters that are scalar variables of the posterior (chain, draw)."""
    posterior = result.idata.posterior
    return [
        str(n) for n in result.params.index if n in posterior.data_vars and posterior[n].ndim == 2
    ]


def thinned_record(result: Any, keep: int = MAX_KEPT_PER_CHAIN) -> dict[str, Any]:
    """{"draws_per_chain", "chains", "step", "params": {name: [[chain 1...], ...]}}."""
    names = population_names(result)
    posterior = result.idata.posterior
    if not names:
        return {}
    first = np.asarray(posterior[names[0]].values)
    return {
        "draws_per_chain": int(first.shape[1]),
        "chains": int(first.shape[0]),
        "step": thinning_step(first.shape[1], keep),
        "params": {n: thin_chains(posterior[n].values, keep).tolist() for n in names},
    }


def result_record(result: Any) -> dict[str, Any]:
    """result.to_dict(), plus the thinned draws of a Bayesian fit (module docstring)."""
    record = result.to_dict()
    if record.get("method") == "bayes" and hasattr(result, "idata") and hasattr(result, "params"):
        thinned = thinned_record(result)
        if thinned:
            record[KEY] = thinned
    return record


def saved_draws(record: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """name -> (chains, kept draws) array from a saved record; {} when it holds none or
    the arrays are ragged."""
    block = record.get(KEY) or {}
    out = {}
    for name, chains in (block.get("params") or {}).items():
        try:
            array = np.asarray(chains, dtype=float)
        except ValueError:
            continue
        if array.ndim == 2 and array.shape[0] >= 1 and array.shape[1] >= 2:
            out[str(name)] = array
    return out
