"""Response probabilities of a fitted model: P(draw) per stopping row (no bust) or P(choose
B) per lottery row, the stop-step distribution of each condition, and the predictor a
maximum-likelihood fit carries (``Fit.predict``). Below both estimation/ml/mle.py, which
attaches the predictor, and estimation/ml/prediction.py, which predicts formula fits on new
rows.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from functools import partial
from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.estimation.cells import scatter_rows
from stopwise.estimation.ml.problem import (
    Layout,
    check_kind,
    pad_rows,
    padded_size,
    subject_index,
    theta_per_cell,
    theta_scalars,
)
from stopwise.models.stopping import Conditions, step_chances

if TYPE_CHECKING:  # annotations only: results imports prediction, which imports this module
    from stopwise.estimation.ml.results import Fit


def _strip(data: Any) -> Any:
    """The bundle without covariate arrays (models never read them; strings would break jit)."""
    return replace(data, covariates={})


def _response_probe(data: Any) -> Any:
    """The rows with the modelled response set: draw without a bust (stopping) or B
    (lottery), so that exp(loglik_obs) is the response probability."""
    if isinstance(data, StoppingData):
        return replace(
            data,
            draw=np.ones_like(np.asarray(data.draw)),
            bust=np.zeros_like(np.asarray(data.bust)),
        )
    return replace(data, choice_b=np.ones_like(np.asarray(data.choice_b)))


@partial(jax.jit, static_argnums=0)
def _compiled_response_probability(model: Any, theta: Mapping[str, Any], probe: Any) -> Any:
    """model.predict(theta, rows), else exp(loglik_obs(theta, probe rows))."""
    if model.predict is not None:
        return model.predict(theta, probe)
    return jnp.exp(model.loglik_obs(theta, probe))


def _response_probability(model: Any, theta: Mapping[str, Any], data: Any) -> np.ndarray:
    """P(modelled response) per row, compiled once per model and bucket of row counts (rows
    padded with copies of the first one): model.predict, else exp(ll) with the response set
    to draw (stopping, no bust) or B (lottery). The model sizes its caps from the concrete
    rows first (options["prepare"])."""
    prepare = model.options.get("prepare") if model.options else None
    if callable(prepare):
        prepare(data)
    bare = _strip(data)
    n = bare.n_obs
    probe = pad_rows(_response_probe(bare) if model.predict is None else bare, padded_size(n))
    theta = {k: jnp.asarray(v, dtype=jnp.float64) for k, v in theta.items()}
    return np.asarray(_compiled_response_probability(model, theta, probe))[:n]


def stop_step_table(model: Any, theta: Mapping[str, Any], data: StoppingData) -> pd.DataFrame:
    """Per condition c and step s, with h_s = P(draw | c, s) and p_s = p_survive(c, s) (the
    step's chance: constant, or a pool's (G - s)/(N - s)):
    reach_s = prod_{j<s} h_j p_j;  P(stop at s) = reach_s (1 - h_s);
    P(bust on the draw at s) = reach_s h_s (1 - p_s)."""
    probe = data.condition_grid()
    horizon, n_cond = probe.horizon, data.n_cond
    cond, step = probe.cond, probe.step
    h = _response_probability(model, theta, probe).reshape(n_cond, horizon)
    p = np.asarray(step_chances(Conditions.from_data(data), horizon))
    log_reach = np.concatenate(
        [np.zeros((n_cond, 1)), np.cumsum(np.log(np.clip(h * p, 1e-300, None)), axis=1)[:, :-1]],
        axis=1,
    )
    reach = np.exp(log_reach)
    return pd.DataFrame(
        {
            "cond": cond,
            "p_survive": np.asarray(data.cond_p_survive)[cond],
            "gain": np.asarray(data.cond_gain)[cond],
            "step": step,
            "p_draw": h.reshape(-1),
            "p_reach": reach.reshape(-1),
            "p_stop_here": (reach * (1 - h)).reshape(-1),
            "p_bust_here": (reach * h * (1 - p)).reshape(-1),
        }
    )


def _make_predictor(
    model: Any, layout: Layout, fit: Fit, fitted: Any, extra: Mapping[str, Any]
) -> Any:
    z_fitted = np.array(fit.z, dtype=np.float64)  # a copy, as device_put made

    def predict(data: Any = None) -> dict[str, pd.DataFrame]:
        z = jax.device_put(z_fitted)  # at the call: a fit that is never asked pays nothing
        data = fitted if data is None else data
        if "cells" in extra:
            if data is not fitted:  # Fit.predict routes new rows to estimation/ml/prediction.py
                raise ValueError("the cell predictor of a formula fit serves the fitted rows")
            cells = extra["cells"]
            theta = theta_per_cell(layout, z, tuple(extra["blocks"]))
            cell_thetas = [{k: v[c] for k, v in theta.items()} for c in range(cells.n_cells)]
            per_cell = np.stack(
                [
                    _response_probability(
                        model,
                        cell_thetas[c],
                        jax.tree_util.tree_map(lambda a, c=c: np.asarray(a)[c], cells.data),
                    )
                    for c in range(cells.n_cells)
                ]
            )
            prob = scatter_rows(per_cell, cells, data.n_obs)
        else:
            check_kind(model, data)
            theta0 = theta_scalars(layout, z)
            prob = _response_probability(model, theta0, _strip(data))
            cell_thetas = [theta0]
        labels = (
            np.asarray(data.subject_labels)[subject_index(data)]
            if data.subject_labels is not None
            else subject_index(data)
        )
        if isinstance(data, LotteryData):
            rows = pd.DataFrame(
                {"subject": labels, "p_choose_b": prob, "chose_b": np.asarray(data.choice_b)}
            )
            return {"rows": rows}
        rows = pd.DataFrame(
            {
                "subject": labels,
                "step": np.asarray(data.step),
                "cond": np.asarray(data.cond),
                "p_draw": prob,
                "drew": np.asarray(data.draw),
            }
        )
        tables = []
        for c, theta in enumerate(cell_thetas):
            t = stop_step_table(model, theta, data)
            if len(cell_thetas) > 1:
                t.insert(0, "cell", c)
            tables.append(t)
        return {"rows": rows, "stop_steps": pd.concat(tables, ignore_index=True)}

    return predict
