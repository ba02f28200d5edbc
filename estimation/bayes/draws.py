"""Posterior draws as flat arrays, and a function mapped over them in compiled chunks."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import jax
import numpy as np


def flatten_chains(samples: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Per site: (chains, draws, ...) -> (chains * draws, ...)."""
    return {k: np.reshape(np.asarray(v), (-1, *np.shape(v)[2:])) for k, v in samples.items()}


def map_draws(
    per_draw: Callable[[Mapping[str, Any]], Any], flat: Mapping[str, np.ndarray], chunk: int
) -> np.ndarray:
    """per_draw(sites) for every draw of ``flat`` (sites with a leading draw axis), stacked
    to (n_draws, ...): jit(vmap(per_draw)) over ``chunk`` draws at a time to bound memory,
    the last chunk padded with copies of its final draw so one compiled shape serves all."""
    batched = jax.jit(jax.vmap(per_draw))
    total = next(iter(flat.values())).shape[0]
    parts = []
    for start in range(0, total, chunk):
        stop = min(start + chunk, total)
        block = {k: v[start:stop] for k, v in flat.items()}
        if stop - start < chunk:
            block = {
                k: np.concatenate([v, np.repeat(v[-1:], chunk - (stop - start), 0)])
                for k, v in block.items()
            }
        parts.append(np.asarray(batched(block))[: stop - start])
    return np.concatenate(parts)
