"""Predictions from saved fits whose parameters differ across rows: formula fits (one
parameter vector per covariate profile) and per-subject fits (one per subject).

* Formula fit: the JSON's "profiles" hold theta_c on the natural scale for every covariate
  profile c of the fitted rows (the values the live fit computed, to_natural(X_c b)). A row
  whose covariate values equal profile c's is predicted with theta_c; a row with values no
  profile has is refused (the patsy design information that would extrapolate is not
  saved). Certificate on the fitted data: sum_c sum_{i in c} log P(y_i | theta_c) equals the
  saved log-likelihood within LOGLIK_RTOL (relative).
* Per-subject fit: subject s is predicted with theta_s (its saved estimates plus the fixed
  values). Certificate on the fitted data: for every subject, sum_{i in s} log P(y_i |
  theta_s) equals that subject's saved log-likelihood within LOGLIK_RTOL.

Rows: P(draw) = h_step(theta) of the row's condition (stopping) or P(choose B) (lottery);
stop-step tables per profile or subject (estimation.ml.response.stop_step_table).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from numbers import Number
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.ml.response import _response_probability, _strip, stop_step_table
from stopwise.models.base import Model

LOGLIK_RTOL = 1e-6
PROFILE_KEYS = frozenset(
    {"profile", "n_rows", "parameter", "estimate", "se", "ci_low", "ci_high", "lower", "upper"}
)


def value_key(value: Any) -> str:
    """A covariate value as compared between the JSON and the data: numbers by their float
    value (1 and 1.0 agree), everything else by its text."""
    if isinstance(value, Number) and not isinstance(value, bool):
        return repr(float(value))
    return str(value)


def plain(value: Any) -> Any:
    """A numpy scalar as the Python value it holds (for messages)."""
    return value.item() if isinstance(value, np.generic) else value


def saved_profiles(
    records: Sequence[Mapping[str, Any]], base: Mapping[str, float]
) -> tuple[list[str], dict[tuple[str, ...], int], dict[int, dict[str, float]]]:
    """(covariate names, covariate key -> profile, profile -> theta) from the long "profiles"
    list (one record per profile and parameter); ``base`` supplies parameters no profile
    record names (fixed values)."""
    if not records:
        raise StopwiseInputError("the saved formula fit holds no covariate profiles")
    variables = [k for k in records[0] if k not in PROFILE_KEYS]
    keys: dict[tuple[str, ...], int] = {}
    thetas: dict[int, dict[str, float]] = {}
    for record in records:
        c = int(record["profile"])
        keys[tuple(value_key(record[v]) for v in variables)] = c
        thetas.setdefault(c, dict(base))[str(record["parameter"])] = float(record["estimate"])
    return variables, keys, thetas


def row_profiles(
    frame: pd.DataFrame, variables: Sequence[str], keys: Mapping[tuple[str, ...], int], source: str
) -> np.ndarray:
    """Profile index of every row; a missing column or unseen combination is an input
    error naming the row and the values."""
    missing = [v for v in variables if v not in frame.columns]
    if missing:
        raise StopwiseInputError(
            f"{source}: the data have no column(s) {missing}, which the saved fit's formulas read"
        )
    columns = [frame[v].to_numpy() for v in variables]
    out = np.empty(len(frame), dtype=int)
    for i in range(len(frame)):
        key = tuple(value_key(col[i]) for col in columns)
        if key not in keys:
            shown = ", ".join(f"{v} = {plain(col[i])!r}" for v, col in zip(variables, columns))
            known = "; ".join(
                ", ".join(f"{v} = {x}" for v, x in zip(variables, k)) for k in list(keys)[:6]
            )
            raise StopwiseInputError(
                f"{source}: data row {i + 1}: {shown} is not a covariate profile of the "
                f"saved fit (it holds: {known}); refit to predict for new covariate values"
            )
        out[i] = keys[key]
    return out


def row_logliks(model: Model, theta: Mapping[str, float], bundle: Any) -> np.ndarray:
    """log P(y_i | theta) for every row, by one compiled program per model and data size."""
    values = {k: jnp.asarray(v, dtype=jnp.float64) for k, v in theta.items()}
    return np.asarray(jax.jit(model.loglik_obs)(values, _strip(bundle)))


def check_loglik(computed: float, saved: Any, what: str, source: str) -> None:
    """Refuse when |computed - saved| / max(1, |saved|) exceeds LOGLIK_RTOL."""
    if saved is None:
        raise StopwiseInputError(f"{source}: no saved log-likelihood for {what} to check against")
    gap = abs(computed - float(saved)) / max(1.0, abs(float(saved)))
    if not gap <= LOGLIK_RTOL:
        raise StopwiseInputError(
            f"{source}: the rebuilt model gives log-likelihood {computed:.6f} for {what} on "
            f"the fitted data, the saved fit {float(saved):.6f}; refusing to predict with it"
        )


def subject_label_array(bundle: Any) -> np.ndarray:
    """The subject label of every row."""
    subject = np.asarray(bundle.subject)
    if bundle.subject_labels is None:
        return subject
    return np.asarray(bundle.subject_labels)[subject]


def grouped_predictions(
    model: Model,
    bundle: Any,
    group: np.ndarray,
    thetas: Mapping[Any, Mapping[str, float]],
    column: str,
) -> dict[str, pd.DataFrame]:
    """ "rows" and, for stopping data, "stop_steps" with row i predicted by
    thetas[group[i]]; ``column`` names the group ("profile" or "subject")."""
    labels = subject_label_array(bundle)
    present = list(dict.fromkeys(group.tolist()))
    if isinstance(bundle, LotteryData):
        prob = np.full(bundle.n_obs, np.nan)
        for g in present:
            rows = np.flatnonzero(group == g)
            prob[rows] = _response_probability(model, thetas[g], _strip(bundle).take(rows))
        rows_frame = pd.DataFrame({"subject": labels})
        if column != "subject":
            rows_frame[column] = group
        rows_frame["p_choose_b"] = prob
        rows_frame["chose_b"] = np.asarray(bundle.choice_b)
        return {"rows": rows_frame}
    cond, step = np.asarray(bundle.cond), np.asarray(bundle.step)
    p_draw = np.full(bundle.n_obs, np.nan)
    tables = []
    for g in present:
        table = stop_step_table(model, thetas[g], bundle)
        grid = table["p_draw"].to_numpy().reshape(bundle.n_cond, -1)
        rows = np.flatnonzero(group == g)
        p_draw[rows] = grid[cond[rows], step[rows]]
        table.insert(0, column, g)
        tables.append(table)
    rows_frame = pd.DataFrame({"subject": labels, "step": step, "cond": cond})
    if column != "subject":
        rows_frame[column] = group
    rows_frame["p_draw"] = p_draw
    rows_frame["drew"] = np.asarray(bundle.draw)
    return {"rows": rows_frame, "stop_steps": pd.concat(tables, ignore_index=True)}


def certify_groups(
    model: Model,
    bundle: Any,
    group: np.ndarray,
    thetas: Mapping[Any, Mapping[str, float]],
    saved: Mapping[Any, Any],
    source: str,
) -> None:
    """Every group's recomputed log-likelihood against its saved one (module docstring)."""
    for g, expected in saved.items():
        rows = group == g
        computed = float(row_logliks(model, thetas[g], bundle)[rows].sum())
        check_loglik(computed, expected, f"{g!r}", source)


def formula_thetas(record: Mapping[str, Any], base: Mapping[str, float]) -> Any:
    """saved_profiles of a formula fit's record."""
    return saved_profiles(record.get("profiles") or [], base)


def subject_thetas(
    fits: Sequence[Mapping[str, Any]], fixed: Mapping[str, float], names: Sequence[str]
) -> dict[str, dict[str, float]]:
    """subject label (as text) -> theta_s: saved estimates plus fixed values."""
    out = {}
    for fit in fits:
        values = {**{k: float(v) for k, v in fixed.items()}}
        values.update({p["name"]: float(p["estimate"]) for p in fit.get("params", [])})
        missing = [n for n in names if n not in values]
        if missing:
            raise StopwiseInputError(
                f"subject {fit.get('subject')!r}: no estimate for parameter(s) {missing}"
            )
        out[str(fit.get("subject"))] = {n: values[n] for n in names}
    return out


def subjects_of_rows(bundle: Any, thetas: Mapping[str, Any], source: str) -> np.ndarray:
    """Every row's subject label as text; a subject the saved fit has no estimates for is
    an input error."""
    labels = np.array([str(s) for s in subject_label_array(bundle)], dtype=object)
    unknown = sorted(set(labels.tolist()) - set(thetas))
    if unknown:
        raise StopwiseInputError(
            f"{source}: subject(s) {unknown[:5]} have no per-subject estimates in the saved "
            "fit; a per-subject fit predicts only the subjects it was fitted to"
        )
    return labels
