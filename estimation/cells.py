"""Split a data bundle into padded blocks ("cells") that share one parameter vector.

Heterogeneity (per-subject fits, covariates, hierarchical Bayes, mixtures) is handled by the
engines, not the models: every model's ``loglik_obs`` takes scalar parameters, and the
engines ``jax.vmap`` it over cells, each cell a block of rows with its own parameters.

    ll[c, i] = mask[c, i] * loglik_obs(theta_c, data_c)[i]

Blocks are padded to the largest cell by repeating the cell's first row with mask 0, so
padded rows give finite log-likelihoods that are multiplied away.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, fields, replace
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np


@dataclass(frozen=True)
class Cells:
    """A batched bundle (leading axis = cell), the row mask and the original row positions."""

    data: Any  # bundle whose array leaves have a leading axis of size n_cells
    mask: np.ndarray  # float64 (n_cells, width); 1 for real rows, 0 for padding
    rows: np.ndarray  # int64 (n_cells, width); original row index, -1 for padding
    labels: np.ndarray  # the cell label of each block

    @property
    def n_cells(self) -> int:
        return int(self.mask.shape[0])


def split_into_cells(data: Any, cell_of_row: Any) -> Cells:
    """Group rows by ``cell_of_row`` (any hashable labels) into padded blocks."""
    cell_of_row = np.asarray(cell_of_row)
    labels, inverse = np.unique(cell_of_row, return_inverse=True)
    order = np.argsort(inverse, kind="stable")
    counts = np.bincount(inverse, minlength=len(labels))
    width = int(counts.max())
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    rows = np.full((len(labels), width), -1, dtype=np.int64)
    for c, (s, n) in enumerate(zip(starts, counts)):
        rows[c, :n] = order[s : s + n]
    mask = (rows >= 0).astype(np.float64)
    filled = np.where(rows >= 0, rows, rows[:, :1])  # pad with the cell's first row
    flat = data.take(filled.reshape(-1))
    batched = _reshape_rows(flat, data, len(labels), width)
    return Cells(data=batched, mask=mask, rows=rows, labels=labels)


def _reshape_rows(flat: Any, original: Any, n_cells: int, width: int) -> Any:
    """Give per-row fields the shape (n_cells, width, ...); broadcast the per-condition
    table (fields named ``cond_*``) to (n_cells, n_cond)."""
    changes: dict[str, Any] = {}
    for f in fields(flat):
        value = getattr(flat, f.name)
        if f.name in _STATIC_FIELDS or value is None:
            continue
        if f.name == "covariates":
            changes[f.name] = {
                k: np.asarray(v).reshape((n_cells, width, *np.shape(v)[1:]))
                for k, v in value.items()
            }
        elif f.name.startswith("cond_"):
            changes[f.name] = np.broadcast_to(np.asarray(value), (n_cells, *np.shape(value)))
        else:
            value = np.asarray(value)
            changes[f.name] = value.reshape((n_cells, width, *value.shape[1:]))
    return replace(flat, **changes)


_STATIC_FIELDS = {"horizon", "subject_labels", "trial_labels", "item_labels"}


def loglik_cells(loglik_obs: Any, theta_cells: Mapping[str, Any], cells: Cells) -> jnp.ndarray:
    """Masked log-likelihood per row, shape (n_cells, width); theta_cells[name] has shape
    (n_cells,)."""
    per_cell = jax.vmap(loglik_obs)(dict(theta_cells), cells.data)
    return jnp.where(cells.mask > 0, per_cell, 0.0)


def scatter_rows(values: Any, cells: Cells, n_obs: int) -> np.ndarray:
    """Put per-cell values (n_cells, width) back in original row order (n_obs,)."""
    out = np.full(n_obs, np.nan)
    values = np.asarray(values)
    keep = cells.rows >= 0
    out[cells.rows[keep]] = values[keep]
    return out


def subject_labels(data: Any) -> np.ndarray:
    """The subjects' labels in subject-index order (0..n-1 when the data carry none)."""
    if data.subject_labels is not None:
        return np.asarray(data.subject_labels)
    return np.arange(data.n_subjects)
