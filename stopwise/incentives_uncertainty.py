"""Uncertainty of a chosen design's predictions from the fit's full covariance.

The fit's estimates are coordinates c with covariance C, on the scale the fit states them:
a saved maximum-likelihood fit stores its optimum z and Cov(z) on the unconstrained scale
(``coefficients`` of the result JSON; theta_k = to_natural_k(z_k), stopwise.models.base);
a mapping may state a natural-scale ``covariance`` or only standard errors (C diagonal).

    delta method:   se(q)^2 = grad_c(q)' C grad_c(q),   grad by central differences
                    dq/dc_k = (q(c + h_k e_k) - q(c - h_k e_k)) / (2 h_k), h_k = 1e-4 max(1, |c_k|)
    bootstrap:      c* ~ N(c_hat, C) (numpy's multivariate normal), theta* = natural(c*)

Correlation between estimates enters both through the off-diagonal of C; each result also
states ``se_uncorrelated`` (C's diagonal only) so the effect of the correlation shows.
Each prediction comes from ``contest_counterfactual.model_row`` (the model's play with its
certificate; an uncertified prediction is left out, never used).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from stopwise.contest_counterfactual import _model_and_theta, model_row
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.incentives_problem import (
    QUANTITIES,
    DesignProblem,
    design_setting,
    limits_hold,
    predicted_quantities,
)
from stopwise.models.base import Model, ParamSpec

CENTRE_TOLERANCE = 1e-6


@dataclass(frozen=True)
class ParameterUncertainty:
    """Coordinates ``center`` with covariance ``covariance`` on ``scale`` ("unconstrained":
    theta = spec.to_natural(c) per parameter; "natural": theta = c) for ``names``; other
    parameters stay at their estimates. ``source`` says where C came from."""

    names: tuple[str, ...]
    center: np.ndarray
    covariance: np.ndarray
    scale: str
    specs: tuple[ParamSpec, ...]
    source: str

    def natural(self, point: Sequence[float]) -> dict[str, float]:
        """theta of the named parameters at coordinates ``point``."""
        if self.scale == "natural":
            return {n: float(v) for n, v in zip(self.names, point)}
        return {
            s.name: float(s.to_natural(np.float64(v), xp=np)) for s, v in zip(self.specs, point)
        }


def _finite_block(matrix: np.ndarray) -> list[int]:
    """Indices whose row and column of ``matrix`` are finite with a positive variance."""
    keep = [i for i in range(len(matrix)) if np.isfinite(matrix[i, i]) and matrix[i, i] > 0]
    return [i for i in keep if np.all(np.isfinite(matrix[i, keep]))]


def _positive_semidefinite(matrix: np.ndarray) -> bool:
    """Symmetric with no eigenvalue below -1e-10 of the largest (rounding)."""
    if not np.allclose(matrix, matrix.T, rtol=1e-8, atol=0.0):
        return False
    eigenvalues = np.linalg.eigvalsh(matrix)
    return bool(eigenvalues.min() >= -1e-10 * max(eigenvalues.max(), 0.0))


def from_standard_errors(
    theta: Mapping[str, float], se: Mapping[str, float], source: str
) -> ParameterUncertainty | None:
    """Natural scale, C = diag(se^2) over the parameters with a finite positive se."""
    names = tuple(k for k, v in se.items() if k in theta and math.isfinite(v) and v > 0)
    if not names:
        return None
    center = np.array([theta[k] for k in names], dtype=float)
    covariance = np.diag([float(se[k]) ** 2 for k in names])
    return ParameterUncertainty(names, center, covariance, "natural", (), source)


def from_natural_covariance(
    theta: Mapping[str, float], stated: Mapping[str, Any]
) -> ParameterUncertainty:
    """A mapping's natural-scale {"names": [...], "matrix": [[...]]}, checked (names known,
    square, symmetric, positive semidefinite)."""
    names = tuple(str(n) for n in stated.get("names", ()))
    matrix = np.asarray(stated.get("matrix", ()), dtype=float)
    unknown = sorted(set(names) - set(theta))
    if unknown or not names:
        raise StopwiseInputError(f"covariance names {list(names)}: unknown {unknown}")
    if matrix.shape != (len(names), len(names)) or not _positive_semidefinite(matrix):
        raise StopwiseInputError(
            f"covariance must be a symmetric positive semidefinite {len(names)}x{len(names)} "
            f"matrix for {list(names)}, got shape {matrix.shape}"
        )
    center = np.array([theta[k] for k in names], dtype=float)
    return ParameterUncertainty(names, center, matrix, "natural", (), "stated covariance")


def from_saved_record(
    record: Mapping[str, Any], model: Model, theta: Mapping[str, float], se: Mapping[str, float]
) -> tuple[ParameterUncertainty | None, list[str]]:
    """Cov(z) of a saved fit's ``coefficients`` on the unconstrained scale of its free
    parameters (model order, held-fixed ones left out), kept only if the z it states maps
    to the saved estimates (relative 1e-6) and C is positive semidefinite; parameters whose
    variance is missing stay at their estimates. Falls back to the standard errors (C
    diagonal) with a note when the record has no usable covariance."""
    fixed = (record.get("spec") or {}).get("fixed") or {}
    free = [n for n in model.param_names if n not in fixed]
    coefficients = record.get("coefficients") or {}
    z, cov = coefficients.get("z"), coefficients.get("covariance")
    fallback = "the fit stores no usable covariance: estimates taken as uncorrelated ({why})"
    if z is None or cov is None or len(z) != len(free):
        why = "no coefficients" if z is None or cov is None else "coefficient count differs"
        return from_standard_errors(theta, se, "standard errors"), [fallback.format(why=why)]
    matrix = np.array([[math.nan if v is None else v for v in row] for row in cov], float)
    keep = _finite_block(matrix)
    specs = tuple(model.spec(free[i]) for i in keep)
    center = np.asarray(z, dtype=float)[keep]
    block = matrix[np.ix_(keep, keep)]
    mapped = [float(s.to_natural(np.float64(c), xp=np)) for s, c in zip(specs, center)]
    stated = [theta[s.name] for s in specs]
    agrees = np.allclose(mapped, stated, rtol=CENTRE_TOLERANCE, atol=1e-12)
    if not keep or not agrees or not _positive_semidefinite(block):
        why = "z does not map to the estimates" if keep and not agrees else "not a covariance"
        return from_standard_errors(theta, se, "standard errors"), [fallback.format(why=why)]
    names = tuple(s.name for s in specs)
    notes = [
        f"{name}: no variance in the fit, held at its estimate"
        for name in free
        if name not in names
    ]
    uncertainty = ParameterUncertainty(
        names, center, block, "unconstrained", specs, "fit covariance (unconstrained scale)"
    )
    return uncertainty, notes


def parameter_uncertainty(
    fit: Any,
) -> tuple[dict[str, Any], ParameterUncertainty | None, list[str]]:
    """(counterfactual input {"model", "params", "max_target"}, the fit's uncertainty, notes)
    of a saved fit (stopwise.load_result) or a mapping with "model", "params" and optional
    "covariance" (natural scale, {"names", "matrix"}) or "se"."""
    if hasattr(fit, "contest_input"):
        base = fit.contest_input()
        se = {str(k): float(v) for k, v in fit.params["se"].items() if np.isfinite(v)}
        uncertainty, notes = from_saved_record(fit.record, base["model"], base["params"], se)
        return base, uncertainty, notes
    if not isinstance(fit, Mapping):
        raise StopwiseInputError("design_incentives needs a saved fit or a mapping")
    model, theta, cap = _model_and_theta(fit)
    base = {"model": model, "params": theta, "max_target": cap}
    if fit.get("covariance") is not None:
        return base, from_natural_covariance(theta, fit["covariance"]), []
    se = {str(k): float(v) for k, v in (fit.get("se") or {}).items()}
    uncertainty = from_standard_errors(theta, se, "standard errors")
    notes = ["estimates taken as uncorrelated (only standard errors given)"] if se else []
    return base, uncertainty, notes


Predictor = Callable[[Mapping[str, float]], dict[str, Any]]


def design_predictor(base: Mapping[str, Any], design: tuple, tolerance: float) -> Predictor:
    """theta -> the model's certified prediction row at ``design`` (players, scheme, prize,
    p_survive), every other parameter at its estimate."""
    scheme = design_setting(*design)

    def predict(theta: Mapping[str, float]) -> dict[str, Any]:
        fit_input = {**base, "params": {**base["params"], **theta}}
        return model_row(fit_input, scheme, tolerance)

    return predict


def delta_method(
    problem: DesignProblem,
    predict: Predictor,
    uncertainty: ParameterUncertainty,
) -> dict[str, Any]:
    """Delta-method standard errors of QUANTITIES (module docstring); a difference step whose
    prediction is uncertified gives NaN. Top-level "se", "gradient" (d goal / d c_k on the
    covariance's scale) and "se_uncorrelated" are those of the goal."""
    center = uncertainty.center
    gradients = np.zeros((len(QUANTITIES), len(center)))
    for k in range(len(center)):
        h = 1e-4 * max(1.0, abs(float(center[k])))
        sides = []
        for sign in (1.0, -1.0):
            point = center.copy()
            point[k] += sign * h
            row = predict(uncertainty.natural(point))
            values = predicted_quantities(problem, row) if row["certified"] else {}
            sides.append([values.get(q, math.nan) for q in QUANTITIES])
        gradients[:, k] = (np.array(sides[0]) - np.array(sides[1])) / (2 * h)
    cov = uncertainty.covariance
    full = np.sqrt(np.maximum(np.einsum("qi,ij,qj->q", gradients, cov, gradients), 0.0))
    diagonal = np.sqrt(gradients**2 @ np.diag(cov))
    return {
        "se": float(full[0]),
        "se_uncorrelated": float(diagonal[0]),
        "gradient": dict(zip(uncertainty.names, gradients[0].tolist())),
        "scale": uncertainty.scale,
        "covariance_source": uncertainty.source,
        "se_by_quantity": dict(zip(QUANTITIES, full.tolist())),
    }


def bootstrap(
    problem: DesignProblem,
    predict: Predictor,
    uncertainty: ParameterUncertainty,
    draws: int,
    seed: int,
) -> dict[str, Any]:
    """Parametric bootstrap: c* ~ N(c_hat, C) by numpy's multivariate normal (seeded),
    theta* = natural(c*); draws the model refuses (outside its parameter range) or whose
    prediction is uncertified are counted and left out. Per quantity: 2.5 and 97.5
    percentiles and sd; ``limits_hold_share``: the share of used draws meeting the limits."""
    rng = np.random.default_rng(seed)
    sample = rng.multivariate_normal(uncertainty.center, uncertainty.covariance, size=draws)
    values: dict[str, list[float]] = {q: [] for q in QUANTITIES}
    refused, held = 0, 0
    for point in sample:
        try:
            row = predict(uncertainty.natural(point))
        except (StopwiseInputError, ValueError, FloatingPointError):
            refused += 1
            continue
        if not row["certified"] or not math.isfinite(row["expected_bank"]):
            refused += 1
            continue
        held += limits_hold(problem, row)
        for q, v in predicted_quantities(problem, row).items():
            values[q].append(v)
    summary = {q: _band(v) for q, v in values.items()}
    used = len(values["goal_value"])
    return {
        "draws": draws,
        "used": used,
        "refused": refused,
        "scale": uncertainty.scale,
        "band_95": summary["goal_value"]["band_95"],
        "sd": summary["goal_value"]["sd"],
        "by_quantity": summary,
        "limits_hold_share": held / used if used else None,
    }


def _band(values: Sequence[float]) -> dict[str, Any]:
    band = [float(np.percentile(values, q)) for q in (2.5, 97.5)] if values else [None, None]
    return {"band_95": band, "sd": float(np.std(values, ddof=1)) if len(values) > 1 else None}
