"""Covariate formulas: a parameter as a linear function of data columns on its unconstrained
scale, ``r ~ 1 + treatment + age`` meaning

    z_r[i] = b_0 + b_treatment * treatment[i] + b_age * age[i],   r[i] = to_natural(z_r[i]).

Design matrices are built with patsy (categorical columns get treatment coding). Rows with the
same design rows across every formula form one cell: the likelihood is evaluated once per cell
with that cell's parameters (see estimation/cells.py).

Each parsed formula keeps patsy's design information, so the design of new rows
(``design_for_new_rows``) uses the fit's categorical levels and the fit's centring and
scaling (``center(age)`` subtracts the mean of the fitted rows, not of the new ones).
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.formula_guard import (
    ALLOWED_FUNCTIONS,
    check_formula_rhs,
    safe_namespace,
)


@dataclass(frozen=True)
class ParamFormula:
    """One parsed formula: the parameter, the right-hand side, the design and its columns."""

    param: str
    rhs: str
    design: np.ndarray  # (n_obs, n_coef)
    columns: tuple[str, ...]
    design_info: Any = None  # patsy.DesignInfo of the fitted rows (levels, centring)
    variables: tuple[str, ...] = ()  # data columns the right-hand side reads
    values: pd.DataFrame | None = None  # those columns on the fitted rows


def parse_lhs(formula: str, param_names: Sequence[str]) -> tuple[str, str]:
    """Split ``param ~ rhs``; the parameter must belong to the model."""
    if formula.count("~") != 1:
        raise StopwiseInputError(
            f"formula {formula!r}: expected 'PARAM ~ 1 + column + ...' with exactly one '~'"
        )
    lhs, rhs = (part.strip() for part in formula.split("~"))
    if lhs not in param_names:
        raise StopwiseInputError(
            f"formula {formula!r}: {lhs!r} is not a parameter of the model; "
            f"its parameters are {', '.join(param_names)}"
        )
    if not rhs:
        raise StopwiseInputError(f"formula {formula!r}: the right-hand side is empty")
    return lhs, rhs


def build_designs(
    formulas: Sequence[str] | Mapping[str, str],
    param_names: Sequence[str],
    columns: Mapping[str, Any] | pd.DataFrame,
) -> dict[str, ParamFormula]:
    """Parse formulas (a list of 'param ~ rhs' strings or a mapping param -> rhs) against
    the per-row covariate ``columns``; an unknown column is an error listing the known ones."""
    import patsy

    items = (
        [f"{k} ~ {v}" for k, v in formulas.items()]
        if isinstance(formulas, Mapping)
        else list(formulas)
    )
    frame = (
        columns
        if isinstance(columns, pd.DataFrame)
        else pd.DataFrame({k: np.asarray(v) for k, v in columns.items()})
    )
    known = ", ".join(map(str, frame.columns)) or "(none)"
    out: dict[str, ParamFormula] = {}
    for formula in items:
        param, rhs = parse_lhs(formula, param_names)
        if param in out:
            raise StopwiseInputError(f"parameter {param!r} has more than one formula")
        check_formula_rhs(rhs, frame.columns, formula)
        try:
            matrix = patsy.dmatrix(
                rhs,
                frame,
                NA_action="raise",
                return_type="dataframe",
                eval_env=patsy.EvalEnvironment([safe_namespace()]),
            )
        except patsy.PatsyError as exc:
            raise StopwiseInputError(
                f"formula {formula!r}: {str(exc).splitlines()[0]}; known covariate columns: {known}"
            ) from None
        design = np.asarray(matrix, dtype=np.float64)
        if design.shape[1] == 0:
            raise StopwiseInputError(
                f"formula {formula!r}: the right-hand side has no terms, so {param} would be "
                f"fixed at 0 on its unconstrained scale; write '{param} ~ 1' for a constant "
                "or hold the parameter at a value with --fix / fixed="
            )
        if np.linalg.matrix_rank(design) < design.shape[1]:
            raise StopwiseInputError(
                f"formula {formula!r}: the design columns {list(matrix.columns)} are collinear "
                "(an effect cannot be told apart from the others)"
            )
        variables = formula_columns(matrix.design_info, frame.columns)
        out[param] = ParamFormula(
            param,
            rhs,
            design,
            tuple(map(str, matrix.columns)),
            matrix.design_info,
            variables,
            frame[list(variables)].reset_index(drop=True),
        )
    return out


def _factor_columns(code: str, known: Any) -> list[str]:
    """Data columns named in one patsy factor's code (names that are not columns, such as
    ``C`` or ``center``, are patsy's functions)."""
    from patsy.eval import ast_names

    known = set(map(str, known))
    return list(dict.fromkeys(n for n in ast_names(code) if n in known))


def formula_columns(design_info: Any, known: Any) -> tuple[str, ...]:
    """Data columns a design reads, in order of first use."""
    names: list[str] = []
    for factor in design_info.factor_infos:
        names += [n for n in _factor_columns(factor.code, known) if n not in names]
    return tuple(names)


def design_for_new_rows(formula: ParamFormula, frame: pd.DataFrame) -> np.ndarray:
    """Design matrix of new rows built with the fit's patsy design information (the fit's
    categorical levels, centring and scaling). A missing column, a missing value or a
    category level the fit never saw is a StopwiseInputError naming the column."""
    import patsy

    text = f"{formula.param} ~ {formula.rhs}"
    check_formula_rhs(formula.rhs, formula.variables, text)
    for factor in formula.design_info.factor_infos:
        check_formula_rhs(factor.code, formula.variables, text)
    known = ", ".join(map(str, frame.columns)) or "(none)"
    for name in formula.variables:
        if name not in frame.columns:
            raise StopwiseInputError(
                f"formula {text!r} reads the column {name!r}, which the new data lack; "
                f"their columns: {known}"
            )
        missing = frame[name].isna().to_numpy()
        if missing.any():
            raise StopwiseInputError(
                f"column {name!r} has {int(missing.sum())} missing value(s) in the new data "
                f"(first at row {int(np.flatnonzero(missing)[0])}, counting from 0); "
                f"formula {text!r} needs a value on every row"
            )
    for factor, info in formula.design_info.factor_infos.items():
        used = _factor_columns(factor.code, frame.columns)
        if info.type != "categorical" or len(used) != 1:
            continue
        levels = list(info.categories)
        unseen = ~frame[used[0]].isin(levels).to_numpy()
        if unseen.any():
            first = frame[used[0]].to_numpy()[unseen][0]
            raise StopwiseInputError(
                f"column {used[0]!r} has the level {first!r} (first at row "
                f"{int(np.flatnonzero(unseen)[0])}, counting from 0), which the fit never saw; "
                f"formula {text!r} knows the levels {', '.join(map(repr, levels))}"
            )
    try:
        (matrix,) = patsy.build_design_matrices(
            [formula.design_info], frame, NA_action="raise", return_type="dataframe"
        )
    except patsy.PatsyError as exc:
        raise StopwiseInputError(
            f"formula {text!r} on the new data: {str(exc).splitlines()[0]}; their columns: {known}"
        ) from None
    return np.asarray(matrix, dtype=np.float64)


def formula_variables(formulas: Sequence[str] | Mapping[str, str] | None) -> list[str]:
    """Bare column names mentioned on the right-hand sides (to pick covariate columns)."""
    if not formulas:
        return []
    items = (
        formulas.values()
        if isinstance(formulas, Mapping)
        else [f.split("~", 1)[-1] for f in formulas]
    )
    names: list[str] = []
    for rhs in items:
        for token in re.findall(r"[A-Za-z_][A-Za-z0-9_.]*", rhs):
            if token not in names and token not in ALLOWED_FUNCTIONS:
                names.append(token)
    return names


def cells_from_designs(
    designs: Mapping[str, ParamFormula], n_obs: int
) -> tuple[np.ndarray, np.ndarray]:
    """Cell index of each row (rows with equal design rows across formulas share a cell) and
    the distinct combined design rows, shape (n_cells, total columns)."""
    if not designs:
        return np.zeros(n_obs, dtype=np.int64), np.ones((1, 0))
    combined = np.concatenate([f.design for f in designs.values()], axis=1)
    unique, inverse = np.unique(combined, axis=0, return_inverse=True)
    return np.asarray(inverse).reshape(-1).astype(np.int64), unique
