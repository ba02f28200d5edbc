"""Data preparation for a Bayesian fit: the bundle in cells, their designs, and the static
``Setup`` of the density (estimation/bayes/density.py).

The rows of a cell are its *distinct* rows (rows equal in every field the model reads --
step, action, bust, condition, group; or the lottery item and choice -- are evaluated once)
and w[c, i] counts the data rows each stands for (0 on padding). Aggregation is checked at the
start values against the plain row sum and dropped if it does not reproduce it; contest
models are never aggregated.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.arrays import STOPPING_ROW_FIELDS, LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.density import (
    CellArgs,
    Setup,
    jitted_total_loglik,
    zero_offset_sites,
)
from stopwise.estimation.bayes.priors import (
    resolve_priors,
)
from stopwise.estimation.cells import Cells, split_into_cells
from stopwise.estimation.formulas import build_designs
from stopwise.models.base import Model
from stopwise.models.spec import build_model

# ---------------------------------------------------------------------------------------
# Data preparation.


def as_bundle(data: Any) -> Any:
    """A StoppingData/LotteryData bundle from a bundle or a loaded Dataset (``.arrays()``)."""
    if isinstance(data, (StoppingData, LotteryData)):
        return data
    if hasattr(data, "arrays"):
        return data.arrays()
    raise StopwiseInputError(
        f"Bayesian fit: expected a StoppingData/LotteryData bundle or a loaded data set, "
        f"got {type(data).__name__}"
    )


def as_model(model: Model | str) -> Model:
    if isinstance(model, Model):
        return model
    if isinstance(model, str):
        return build_model(model)
    raise StopwiseInputError(f"expected a Model or a model spec string, got {type(model).__name__}")


def check_kind(model: Model, data: Any) -> None:
    want = LotteryData if model.data_kind == "lottery" else StoppingData
    if not isinstance(data, want):
        got = "lottery" if isinstance(data, LotteryData) else "stopping"
        raise StopwiseInputError(
            f"model {model.name} is a {model.data_kind} model but the data are {got} data"
        )


def unit_of_rows(data: Any, pointwise: str) -> tuple[np.ndarray, np.ndarray, str]:
    """Pointwise unit index per row (0..n_units-1), the unit labels and the unit name."""
    if pointwise == "row":
        n = data.n_obs
        return np.arange(n), np.arange(n), "row"
    if pointwise == "trial" and isinstance(data, StoppingData):
        labels, index = np.unique(np.asarray(data.trial), return_inverse=True)
        return index.reshape(-1), labels, "trial"
    if pointwise == "subject":
        labels, index = np.unique(np.asarray(data.subject), return_inverse=True)
        return index.reshape(-1), labels, "subject"
    raise StopwiseInputError(
        f"pointwise={pointwise!r}: expected 'row', 'subject' or (stopping data) 'trial'"
    )


ROW_SIGNATURE = {
    "stopping": ("step", "draw", "bust", "cond", "group"),
    "lottery": ("choice_b", "a_x", "a_p", "b_x", "b_p"),
}


def distinct_rows(data: Any, key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First index of each distinct (cell key, row fields) combination and, per row, the
    index of its distinct combination."""
    kind = "lottery" if isinstance(data, LotteryData) else "stopping"
    columns = [np.asarray(key, np.float64).reshape(len(key), 1)]
    for name in ROW_SIGNATURE[kind]:
        value = np.asarray(getattr(data, name), np.float64)
        columns.append(value.reshape(len(key), -1))
    _, first, inverse = np.unique(
        np.hstack(columns), axis=0, return_index=True, return_inverse=True
    )
    return first, inverse.reshape(-1)


def aggregation_is_exact(model: Model, data: Any, args: CellArgs, setup: Setup) -> bool:
    """Check at the start values that weighted distinct rows reproduce the row sum (a model
    whose rows depend on other rows, e.g. through the trial, would fail this)."""
    theta = model.start_theta()
    labels = ("trial_labels",) if isinstance(data, StoppingData) else ("item_labels",)
    plain = replace(data, covariates={}, subject_labels=None, **dict.fromkeys(labels))
    direct = float(jax.jit(lambda t, d: jnp.sum(model.loglik_obs(t, d)))(theta, plain))
    sites = {f"z_{s.name}": s.to_unconstrained(theta[s.name]) for s in setup.specs}
    sites.update({f"b_{n}": jnp.zeros(len(setup.effect_columns(n))) for n in setup.names})
    if setup.hierarchical:
        sites.update(zero_offset_sites(setup, sites))
    pooled = float(jitted_total_loglik(setup, sites, args))
    return math.isfinite(direct) and abs(direct - pooled) <= 1e-9 * max(1.0, abs(direct))


def build_designs_for(model: Model, data: Any, formulas: Any) -> dict[str, Any]:
    """Per-row design matrices and column names for every parameter (ones without formula)."""
    n = data.n_obs
    parsed = build_designs(formulas, model.param_names, dict(data.covariates)) if formulas else {}
    out = {}
    for name in model.param_names:
        if name in parsed:
            out[name] = (parsed[name].design, parsed[name].columns)
        else:
            out[name] = (np.ones((n, 1)), ("Intercept",))
    return out


def prepare(
    model: Model,
    data: Any,
    *,
    hierarchical: bool,
    formulas: Any,
    priors: Mapping[str, Any] | None,
    pointwise: str,
    aggregate: bool = True,
    centred: Sequence[bool] = (),
) -> tuple[Setup, CellArgs, Cells, np.ndarray, str]:
    """Cells (subject x distinct design row when hierarchical, distinct design row when
    pooled), their designs and subjects, and the static setup. With ``aggregate``, rows that
    agree in every field the model reads (all but trial) and in their cell are evaluated
    once and weighted by their count."""
    designs = build_designs_for(model, data, formulas)
    data = replace(data, covariates={})  # the formulas have read them; models do not
    combined = np.concatenate([d for d, _ in designs.values()], axis=1)
    _, design_row = np.unique(combined, axis=0, return_inverse=True)
    design_row = design_row.reshape(-1)
    subject = np.asarray(data.subject).astype(np.int64)
    key = subject * (int(design_row.max()) + 1) + design_row if hierarchical else design_row
    if aggregate:
        first, inverse = distinct_rows(data, key)
    else:
        first, inverse = np.arange(data.n_obs), np.arange(data.n_obs)
    counts = np.bincount(inverse, minlength=len(first)).astype(np.float64)
    cells = split_into_cells(data.take(first), key[first])
    cell_of, pos_of = np.zeros(len(first), np.int64), np.zeros(len(first), np.int64)
    filled = cells.rows >= 0
    cell_of[cells.rows[filled]] = np.nonzero(filled)[0]
    pos_of[cells.rows[filled]] = np.nonzero(filled)[1]
    head = first[cells.rows[:, 0]]  # an original row of each cell
    unit_index, unit_labels, unit_name = unit_of_rows(data, pointwise)
    args = CellArgs(
        data=jax.tree_util.tree_map(jnp.asarray, cells.data),
        weight=jnp.asarray(np.where(filled, counts[np.maximum(cells.rows, 0)], 0.0)),
        designs={n: jnp.asarray(d[head]) for n, (d, _) in designs.items()},
        cell_subject=jnp.asarray(subject[head]),
        row_cell=jnp.asarray(cell_of[inverse]),
        row_pos=jnp.asarray(pos_of[inverse]),
        row_unit=jnp.asarray(unit_index),
    )
    setup = Setup(
        model=model,
        priors=resolve_priors(model, priors),
        coef_names={n: tuple(c) for n, (_, c) in designs.items()},
        hierarchical=hierarchical,
        n_subjects=int(data.n_subjects),
        centred=tuple(bool(c) for c in centred) if hierarchical else (),
    )
    return setup, args, cells, unit_labels, unit_name


def pad_cells(args: CellArgs, width: int) -> CellArgs:
    """The same cells padded (weight 0, copies of each cell's first row) to ``width`` rows,
    without the per-row maps: for re-running one compiled sampler on data sets of different
    sizes (simulation-based calibration)."""
    have = int(args.weight.shape[1])
    if width < have:
        raise ValueError(f"cannot pad {have} rows down to {width}")
    extra = width - have

    fields = (
        STOPPING_ROW_FIELDS
        if isinstance(args.data, StoppingData)
        else ("subject", "choice_b", "a_x", "a_p", "b_x", "b_p")
    )

    def widen(leaf: Any) -> Any:
        return jnp.concatenate([leaf, jnp.repeat(leaf[:, :1], extra, axis=1)], axis=1)

    data = replace(args.data, **{f: widen(jnp.asarray(getattr(args.data, f))) for f in fields})
    weight = jnp.concatenate([args.weight, jnp.zeros((args.weight.shape[0], extra))], axis=1)
    dummy = jnp.zeros(1, jnp.int32)
    return CellArgs(
        data=data,
        weight=weight,
        designs=args.designs,
        cell_subject=args.cell_subject,
        row_cell=dummy,
        row_pos=dummy,
        row_unit=dummy,
    )
