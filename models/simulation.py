"""The public simulator: ``simulate(model or spec string, params, design, seed)`` for one
parameter set or a population (one row of parameters per subject), over a design of trials
or lottery items. Above both models/spec.py (spec strings) and models/simulate.py (the
simulators a Model carries), which therefore no longer import each other.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from typing import Any

import jax
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.limits import MAX_SIMULATED_TRIALS
from stopwise.models.spec import build_model


def _resolve_theta(model: Any, given: Mapping[str, Any], where: str) -> dict[str, float]:
    names = model.param_names
    unknown = [k for k in given if k not in names]
    if unknown:
        raise StopwiseInputError(
            f"{where}: unknown parameter(s) {', '.join(map(str, unknown))} for model "
            f"{model.name}; its parameters are {', '.join(names) or 'none'}"
        )
    theta = {}
    for spec in model.params:
        if spec.name not in given:
            theta[spec.name] = spec.start
            continue
        try:
            value = float(given[spec.name])
        except (TypeError, ValueError):
            raise StopwiseInputError(
                f"{where}: parameter {spec.name} must be a number, got {given[spec.name]!r}"
            ) from None
        if not math.isfinite(value):
            raise StopwiseInputError(
                f"{where}: parameter {spec.name} = {value}; expected a finite number in "
                f"({spec.lower:g}, {spec.upper:g}) (leave it out to use its start value "
                f"{spec.start:g})"
            )
        if not spec.lower < value < spec.upper:
            raise StopwiseInputError(
                f"{where}: parameter {spec.name} = {value} lies outside its range "
                f"({spec.lower}, {spec.upper})"
            )
        theta[spec.name] = value
    return theta


def check_simulation_size(n_rows: int) -> None:
    """Refuse a design of more than MAX_SIMULATED_TRIALS rows (README, "Limits") before
    anything is allocated for it."""
    if n_rows > MAX_SIMULATED_TRIALS:
        raise StopwiseInputError(
            f"a simulation of {n_rows} trials or choices is beyond the documented limit of "
            f"{MAX_SIMULATED_TRIALS} (README, 'Limits'); simulate in parts with different seeds"
        )


def _missing_names(model: Any, given: Any) -> list[str]:
    return [n for n in model.param_names if n not in given]


def simulate(model: Any, params: Any, design: pd.DataFrame, seed: int = 0) -> pd.DataFrame:
    """Simulate data from ``model`` (a Model or a spec string) over ``design``.

    ``params``: a mapping name -> value for everyone, or a DataFrame with one row per subject
    (column ``subject`` plus parameter columns) for a heterogeneous population. Parameters
    not given take the model's start values (with a warning). ``design``: one row per trial
    (stopping: subject, trial, p_survive, gain, optional start, bust_keep, covariates) or per
    lottery item (subject, item, a_x1, a_p1, ..., b_x1, b_p1, ...). Reproducible by ``seed``.
    """
    if isinstance(model, str):
        model = build_model(model)
    if not isinstance(design, pd.DataFrame):
        raise StopwiseInputError(f"design must be a pandas DataFrame, got {type(design)}")
    check_simulation_size(len(design))
    key = jax.random.PRNGKey(int(seed))
    if isinstance(params, pd.DataFrame):
        return _simulate_population(model, params, design, key)
    if not isinstance(params, Mapping):
        raise StopwiseInputError(
            f"params must be a mapping name -> value or a DataFrame, got {type(params)}"
        )
    theta = _resolve_theta(model, params, "params")
    missing = _missing_names(model, params)
    if missing:
        warnings.warn(
            f"parameters {', '.join(missing)} not given; using the start values of {model.name}",
            stacklevel=2,
        )
    return model.simulate(theta, design, key)


def _simulate_population(
    model: Any, params: pd.DataFrame, design: pd.DataFrame, key: Any
) -> pd.DataFrame:
    if "subject" not in params.columns:
        raise StopwiseInputError("params DataFrame needs a 'subject' column")
    if params["subject"].duplicated().any():
        raise StopwiseInputError("params DataFrame has more than one row for a subject")
    if "subject" not in design.columns:
        raise StopwiseInputError("design lacks the column 'subject'")
    given = [c for c in params.columns if c != "subject"]
    missing = _missing_names(model, given)
    if missing:
        warnings.warn(
            f"parameters {', '.join(missing)} not given; using the start values of {model.name}",
            stacklevel=3,
        )
    by_subject = {row["subject"]: row for row in params.to_dict("records")}
    pieces = []
    for index, (subject, rows) in enumerate(design.groupby("subject", sort=True)):
        if subject not in by_subject:
            raise StopwiseInputError(f"params DataFrame has no row for subject {subject!r}")
        values = {k: v for k, v in by_subject[subject].items() if k != "subject"}
        theta = _resolve_theta(model, values, f"params row of subject {subject!r}")
        pieces.append(model.simulate(theta, rows, jax.random.fold_in(key, index)))
    return pd.concat(pieces, ignore_index=True)
