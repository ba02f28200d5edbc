"""Predictions of a fit whose parameters follow covariate formulas, on its own or new rows.

A formula fit maps each row's covariates x_p[i] (built with the fit's patsy design
information, so levels and centring are the fit's) to its parameters

    theta_p[i] = to_natural_p(x_p[i]' b_p),

and rows whose design rows agree across every formula share one *covariate profile*. Per
profile the model gives P(draw | condition, step) (or P(choose B)), and the distribution of
the step at which a trial ends (estimation/ml/response.py ``stop_step_table``).

The result is a dict of frames:

* ``rows``: one row per decision: ``subject``, ``step``, ``cond``, ``profile``, ``p_draw``
  (predicted probability of drawing), ``drew`` (1 = drew, as observed); for lottery data
  ``subject``, ``profile``, ``p_choose_b``, ``chose_b``.
* ``stop_steps`` (stopping data): one row per profile, condition and step: ``profile``,
  ``cond``, ``p_survive``, ``gain``, ``step``, ``p_draw``, ``p_reach``, ``p_stop_here``,
  ``p_bust_here``.
* ``profiles``: one row per profile: ``profile``, the covariate columns the formulas read
  (the values of the profile's first row), ``n_rows`` (rows with this profile) and each
  model parameter on its natural scale.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.load import Dataset, load
from stopwise.estimation.formulas import ParamFormula, cells_from_designs, design_for_new_rows
from stopwise.estimation.ml.problem import Layout, check_kind, subject_index, theta_per_cell
from stopwise.estimation.ml.response import _response_probability, _strip, stop_step_table


def resolve_new_data(
    data: Any, covariates: pd.DataFrame | None = None
) -> tuple[StoppingData | LotteryData, pd.DataFrame | None]:
    """(array bundle, row-aligned covariate frame or None) from a file path, a DataFrame, a
    loaded Dataset or a bundle (whose covariates come from ``covariates`` or the bundle)."""
    if isinstance(data, (str, os.PathLike, pd.DataFrame, Dataset)):
        dataset = load(data)
        bundle, frame = dataset.arrays(), dataset.frame.reset_index(drop=True)
        if covariates is not None:
            raise StopwiseInputError(
                "covariates= is for array bundles; a data frame or file carries its own "
                "covariate columns"
            )
        return bundle, frame
    if isinstance(data, (StoppingData, LotteryData)):
        if covariates is None:
            return data, None
        if not isinstance(covariates, pd.DataFrame):
            raise StopwiseInputError(
                f"covariates must be a DataFrame aligned with the rows, not "
                f"{type(covariates).__name__}"
            )
        if len(covariates) != data.n_obs:
            raise StopwiseInputError(
                f"the covariate table has {len(covariates)} rows but the new data have "
                f"{data.n_obs} rows"
            )
        return data, covariates.reset_index(drop=True)
    raise StopwiseInputError(
        "new data must be a file path (CSV or Parquet), a DataFrame, a loaded Dataset or an "
        f"array bundle, not {type(data).__name__}"
    )


def check_rows_explained(model: Any, bundle: Any) -> None:
    """Refuse new stopping rows the model does not explain: contest decisions (task
    "contest") for a solo model, solo decisions for a contest model (fits use only the rows
    their model explains, so predictions must too)."""
    check_kind(model, bundle)
    if not isinstance(bundle, StoppingData) or model.data_kind not in ("stopping", "contest"):
        return
    contest = np.asarray(bundle.cond_contest)[np.asarray(bundle.cond)] > 0.5
    other = ~contest if model.data_kind == "contest" else contest
    if other.any():
        kind, wanted = ("solo", "contest") if model.data_kind == "contest" else ("contest", "solo")
        raise StopwiseInputError(
            f"the new data hold {int(other.sum())} {kind} decisions (first at row "
            f"{int(np.flatnonzero(other)[0])}, counting from 0), which the {wanted} model "
            f"{model.name} does not explain; pass only the {wanted} decisions"
        )


def profile_designs(
    designs: Mapping[str, ParamFormula], frame: pd.DataFrame
) -> tuple[np.ndarray, np.ndarray]:
    """Profile index of each new row and the distinct combined design rows (the profiles),
    each formula's design built with the fit's design information."""
    new = {p: replace(f, design=design_for_new_rows(f, frame)) for p, f in designs.items()}
    return cells_from_designs(new, len(frame))


def profile_blocks(
    layout: Layout, designs: Mapping[str, ParamFormula], unique: np.ndarray
) -> tuple[Any, ...]:
    """Per free parameter, its design block (n_profiles, n_coef) cut from the combined
    profile rows in formula order; a column of ones for a parameter without a formula."""
    widths = {p: len(f.columns) for p, f in designs.items()}
    offsets = dict(zip(designs, np.cumsum([0, *widths.values()])[:-1]))
    return tuple(
        jnp.asarray(unique[:, offsets[name] : offsets[name] + widths[name]])
        if name in designs
        else jnp.ones((unique.shape[0], 1))
        for name in layout.free
    )


def profile_thetas(
    layout: Layout, z: np.ndarray, designs: Mapping[str, ParamFormula], unique: np.ndarray
) -> list[dict[str, float]]:
    """theta_p[c] = to_natural_p(X_p[c] b_p) for each profile c, as plain dicts."""
    theta = theta_per_cell(layout, jnp.asarray(z), profile_blocks(layout, designs, unique))
    return [
        {name: float(np.asarray(v)[c]) for name, v in theta.items()} for c in range(len(unique))
    ]


def profiles_frame(
    designs: Mapping[str, ParamFormula],
    frame: pd.DataFrame,
    profile: np.ndarray,
    thetas: list[dict[str, float]],
) -> pd.DataFrame:
    """One row per profile: its covariate values (first row), row count and parameters."""
    variables = list(dict.fromkeys(v for f in designs.values() for v in f.variables))
    first = np.array([int(np.flatnonzero(profile == c)[0]) for c in range(len(thetas))])
    out = frame.iloc[first][variables].reset_index(drop=True)
    out.insert(0, "profile", np.arange(len(thetas)))
    out["n_rows"] = np.bincount(profile, minlength=len(thetas))
    for name in thetas[0]:
        out[name] = [t[name] for t in thetas]
    return out


def predict_formula_fit(
    model: Any,
    layout: Layout,
    z: np.ndarray,
    designs: Mapping[str, ParamFormula],
    data: Any,
    covariates: pd.DataFrame | None = None,
) -> dict[str, pd.DataFrame]:
    """Predictions of a formula fit on new rows (module docstring for the frames)."""
    bundle, frame = resolve_new_data(data, covariates)
    check_rows_explained(model, bundle)
    if frame is None:
        frame = pd.DataFrame({k: np.asarray(v) for k, v in bundle.covariates.items()})
    profile, unique = profile_designs(designs, frame)
    thetas = profile_thetas(layout, z, designs, unique)
    bare = _strip(bundle)
    prob = np.full(bundle.n_obs, np.nan)
    for c, theta in enumerate(thetas):
        rows = np.flatnonzero(profile == c)
        prob[rows] = _response_probability(model, theta, bare.take(rows))
    labels = (
        np.asarray(bundle.subject_labels)[subject_index(bundle)]
        if bundle.subject_labels is not None
        else subject_index(bundle)
    )
    out = {"profiles": profiles_frame(designs, frame, profile, thetas)}
    if isinstance(bundle, LotteryData):
        out["rows"] = pd.DataFrame(
            {
                "subject": labels,
                "profile": profile,
                "p_choose_b": prob,
                "chose_b": np.asarray(bundle.choice_b),
            }
        )
        return out
    out["rows"] = pd.DataFrame(
        {
            "subject": labels,
            "step": np.asarray(bundle.step),
            "cond": np.asarray(bundle.cond),
            "profile": profile,
            "p_draw": prob,
            "drew": np.asarray(bundle.draw),
        }
    )
    tables = []
    for c, theta in enumerate(thetas):
        table = stop_step_table(model, theta, bare)
        table.insert(0, "profile", c)
        tables.append(table)
    out["stop_steps"] = pd.concat(tables, ignore_index=True)
    return out


def in_sample_profiles(
    result: dict[str, pd.DataFrame],
    layout: Layout,
    z: np.ndarray,
    designs: Mapping[str, ParamFormula],
) -> dict[str, pd.DataFrame]:
    """The engine's in-sample prediction of a formula fit in the frames of
    ``predict_formula_fit`` (its cells are the fitted rows' profiles)."""
    n_obs = len(result["rows"])
    profile, unique = cells_from_designs(designs, n_obs)
    thetas = profile_thetas(layout, z, designs, unique)
    frame = pd.concat([f.values for f in designs.values()], axis=1)
    frame = frame.loc[:, ~frame.columns.duplicated()]
    rows = result["rows"].copy()
    rows.insert(len(rows.columns) - 2 if "step" in rows else 1, "profile", profile)
    out = {"profiles": profiles_frame(designs, frame, profile, thetas), "rows": rows}
    if "stop_steps" in result:
        steps = result["stop_steps"].rename(columns={"cell": "profile"})
        if "profile" not in steps:
            steps.insert(0, "profile", 0)
        out["stop_steps"] = steps
    return out
