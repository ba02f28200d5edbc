"""Which parameters the data identify, and what a fit may honestly report about them.

Checks, in order (thresholds are stated constants):

1. *Constant response* (before fitting): every decision is the same (all "draw", all
   "stop", all A or all B). The likelihood then rises towards perfect prediction without
   a maximum; the fit is refused.
2. *Parameters the data cannot move*: the per-observation derivative d ll_i / d z_j is
   zero (|.| <= FLAT_DERIVATIVE) for every observation, at the estimate and at the start
   values. The reason is named: with no losses in the data (no outcome below the reference
   point) the loss parameters (beta, loss_aversion, and delta of TK weighting) never enter
   the likelihood. Such parameters are held fixed at their start values and the fit is
   repeated, so the identified ones get standard errors; a note says so.
3. *Flat directions of the Hessian*: H = V diag(lambda) V' of the negative
   log-likelihood on the unconstrained scale; an eigenvalue lambda_j <= NULL_EIGEN *
   max|lambda| is a direction along which the fit does not change; the parameters with
   loading |V_ij| >= LOADING on it are named and their standard errors withheld (NaN).
4. *Perfect prediction*: ln L / n_obs >= -PERFECT_PER_OBS, i.e. on average every decision
   is predicted with probability above about 1 - 1e-6 (e.g. every trial of a condition
   ends at the same step): the likelihood has no interior maximum, the estimates only
   mark where the optimiser stopped, and no standard error is reported.
5. A parameter at (or running off to) a bound of its range gets no standard error either.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.loss_side import data_has_losses, loss_parameters
from stopwise.estimation.ml.covariance import RowTable, wald_rows
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.natural_profiles import attach_profiles
from stopwise.estimation.ml.results import Fit

FLAT_DERIVATIVE = 1e-12
NULL_EIGEN = 1e-9
LOADING = 0.3
PERFECT_PER_OBS = 1e-6


@dataclass
class Identification:
    """The identification report of one fit (module docstring)."""

    unidentified: dict[str, str] = field(default_factory=dict)  # parameter -> reason
    fixed: dict[str, float] = field(default_factory=dict)  # held at these values
    cannot_move: list[str] = field(default_factory=list)  # zero derivative everywhere
    smallest_relative_eigenvalue: float = float("nan")
    perfect_prediction: bool = False
    null_space: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)), repr=False)

    @property
    def status(self) -> str:
        if self.perfect_prediction:
            return "not identified (perfect prediction)"
        return "partly identified" if self.unidentified else "identified"

    def to_dict(self) -> dict[str, Any]:
        value = self.smallest_relative_eigenvalue
        return {
            "status": self.status,
            "unidentified": [{"name": k, "reason": v} for k, v in self.unidentified.items()],
            "fixed": dict(self.fixed),
            "smallest_relative_eigenvalue": float(value) if np.isfinite(value) else None,
            "perfect_prediction": bool(self.perfect_prediction),
        }

    def summary_line(self) -> str:
        if not self.unidentified and not self.perfect_prediction:
            return (
                "Identification: every parameter identified (smallest Hessian eigenvalue "
                f"{self.smallest_relative_eigenvalue:.2g} of the largest)"
            )
        named = "; ".join(f"{k}: {v}" for k, v in self.unidentified.items())
        held = (
            " Held fixed: " + ", ".join(f"{k} = {v:g}" for k, v in self.fixed.items()) + "."
            if self.fixed
            else ""
        )
        return f"Identification: {self.status}. {named}.{held}"


def constant_response(data: Any) -> str | None:
    """A sentence when every decision in the data is the same, else None."""
    if isinstance(data, StoppingData):
        values, what = np.asarray(data.draw), ("stop", "draw")
    elif isinstance(data, LotteryData):
        values, what = np.asarray(data.choice_b), ("A", "B")
    else:
        return None
    if values.size == 0 or np.unique(values).size > 1:
        return None
    return f"every one of the {values.size} decisions is {what[int(values[0] > 0.5)]!r}"


def refuse_constant_response(model_name: str, data: Any) -> None:
    """Check 1 of the module docstring."""
    found = constant_response(data)
    if found:
        raise StopwiseInputError(
            f"cannot fit {model_name}: {found}, so the model can predict the data perfectly "
            "and no parameter has a maximum-likelihood estimate (perfect prediction); "
            "fit data in which the decisions vary"
        )


def flat_coefficients(jac_at_estimate: np.ndarray, jac_at_start: np.ndarray) -> np.ndarray:
    """Coefficient columns with every |d ll_i / d z_j| <= FLAT_DERIVATIVE at both points."""
    return (np.max(np.abs(jac_at_estimate), axis=0) <= FLAT_DERIVATIVE) & (
        np.max(np.abs(jac_at_start), axis=0) <= FLAT_DERIVATIVE
    )


def null_directions(h: np.ndarray) -> tuple[float, list[tuple[float, np.ndarray]]]:
    """Smallest eigenvalue of H relative to the largest |eigenvalue|, and (relative
    eigenvalue, eigenvector) for every eigenvalue at most NULL_EIGEN of it (module
    docstring, check 3; a clearly negative one means no maximum along that direction)."""
    if not np.all(np.isfinite(h)):
        return float("nan"), []
    lam, vec = np.linalg.eigh(0.5 * (h + h.T))
    top = max(float(np.max(np.abs(lam))), 1e-300)
    flat = [(float(lam[j] / top), vec[:, j]) for j in range(len(lam)) if lam[j] <= NULL_EIGEN * top]
    return float(lam.min() / top), flat


def direction_reason(relative: float, others: list[str], at_bound: bool) -> str:
    """Why a parameter on a flat (or downward) Hessian direction is not identified."""
    shared = f" shared with {', '.join(others)}" if others else ""
    if at_bound and not others:
        return "runs off to a bound of its range, where the likelihood is flat in it"
    if relative < -NULL_EIGEN:
        return (
            f"the log-likelihood curves upward along a direction{shared} (Hessian "
            f"eigenvalue {relative:.2g} of the largest): no maximum there"
        )
    return f"a flat direction of the likelihood{shared} (near-zero Hessian eigenvalue)"


def parameter_of(coef_name: str) -> str:
    """'r:treatment' -> 'r'; 'type1:r' stays as it is (mixtures are not assessed here)."""
    return coef_name.split(":", 1)[0]


def assess(fit: Fit, model: Any, data: Any) -> Identification:
    """Checks 2-4 of the module docstring on a fitted pooled problem."""
    problem = fit.extras["problem"]
    z = np.asarray(fit.z)
    mask = problem.weights > 0
    jac = problem.row_jacobian(z)[mask]  # row scores only: no second-order program needed
    jac0 = problem.row_jacobian(problem.z0)[mask]
    report = Identification()
    flat = flat_coefficients(jac, jac0)
    losses = data_has_losses(model, data)
    loss_names = loss_parameters(model)
    names = [parameter_of(c) for c in problem.coef_names]
    for j, name in enumerate(names):
        if flat[j] and name not in report.unidentified:
            report.cannot_move.append(name)
            report.unidentified[name] = (
                "the data hold no losses (no outcome below the reference point), so it "
                "never enters the likelihood"
                if name in loss_names and not losses
                else "the log-likelihood does not depend on it on these data (zero "
                "derivative for every decision)"
            )
    smallest, directions = null_directions(problem.hess(z))
    report.smallest_relative_eigenvalue = smallest
    report.null_space = (
        np.array([v for _, v in directions]).T if directions else np.zeros((len(z), 0))
    )
    for relative, v in directions:
        on_ridge = sorted({names[j] for j in range(len(v)) if abs(v[j]) >= LOADING and not flat[j]})
        for name in on_ridge:
            others = [n for n in on_ridge if n != name]
            report.unidentified.setdefault(
                name, direction_reason(relative, others, name in fit.at_bound)
            )
    report.perfect_prediction = bool(fit.loglik >= -PERFECT_PER_OBS * max(fit.n_obs, 1))
    return report


def single_parameter_fixes(report: Identification, model: Any, formulas: Any) -> dict[str, float]:
    """Parameters to hold at their start values: those the data cannot move at all (no
    formula on them). Ridges shared by several parameters are only reported."""
    with_formula = set(_formula_targets(formulas))
    return {
        name: float(model.spec(name).start)
        for name in report.cannot_move
        if name not in with_formula and name in model.param_names
    }


def _formula_targets(formulas: Any) -> list[str]:
    if not formulas:
        return []
    if isinstance(formulas, Mapping):
        return [str(k) for k in formulas]
    return [str(f).split("~", 1)[0].strip() for f in formulas]


def restricted_covariance(fit: Fit, null_space: np.ndarray, ridge: set[str]) -> None:
    """Standard errors for the identified directions when the Hessian is singular: with
    P = I - N N' (N the null-space eigenvectors), H+ = pinv(P H P) and V = H+ (Hessian) or
    c H+ (S'S) H+ (clustered sandwich, CR1 factor c). A coefficient whose unit vector is
    not orthogonal to N (|loading| > 1e-6) has no estimable variance and stays NaN (the
    caller withholds it)."""
    problem = fit.extras["problem"]
    z = np.asarray(fit.z)
    h = problem.hess(z)
    proj = np.eye(len(z)) - null_space @ null_space.T
    h_plus = np.linalg.pinv(proj @ (0.5 * (h + h.T)) @ proj, rcond=1e-8, hermitian=True)
    if fit.se_method == "robust":
        scores = problem.cluster_scores(z) @ proj
        g, n, k = scores.shape[0], problem.n_obs, len(z) - null_space.shape[1]
        factor = g / (g - 1.0) * (n - 1.0) / (n - k) if g > 1 and n > k else 1.0
        cov = factor * h_plus @ (scores.T @ scores) @ h_plus
        if g < 30:
            fit.warnings.append(
                f"only {g} clusters (subjects): the clustered sandwich understates "
                "uncertainty below about 30 clusters"
            )
    else:
        cov = h_plus
    fit.cov_z = cov
    fit.table = wald_rows(problem.reported, z, cov)
    leaning = {
        parameter_of(c)
        for j, c in enumerate(problem.coef_names)
        if np.max(np.abs(null_space[j]), initial=0.0) > 1e-6
    } - set(ridge)
    if leaning:
        withhold_standard_errors(
            fit,
            leaning,
            f"{', '.join(sorted(leaning))}: variance not estimable (leans on a "
            "flat direction of the likelihood)",
        )
    fit.warnings[:] = [w for w in fit.warnings if "not positive definite" not in w]
    fit.notes.append(
        "the Hessian is singular along the flat directions named under Identification; "
        "standard errors of the other parameters use its pseudo-inverse on the identified "
        "directions"
    )


def withhold_standard_errors(fit: Fit, names: set[str] | None, reason: str | None) -> None:
    """NaN standard errors and intervals for the rows of ``names`` (all rows if None)."""
    t = fit.table
    hit = np.array([names is None or parameter_of(n) in names for n in t.names], dtype=bool)
    if not hit.any():
        return
    nan = np.where(hit, np.nan, 1.0)
    fit.table = RowTable(t.names, t.estimate, t.se * nan, t.ci_low * nan, t.ci_high * nan, t.scale)
    if reason:
        fit.warnings.append(reason)


def apply_report(fit: Fit, report: Identification) -> Fit:
    """Attach the report and withhold standard errors it does not support."""
    fit.identification = report
    if report.perfect_prediction:
        withhold_standard_errors(
            fit,
            None,
            f"perfect prediction: the model predicts the {fit.n_obs} decisions with "
            f"log-likelihood {fit.loglik:.3g} (every decision with probability above about "
            "1 - 1e-6); no parameter is identified, the estimates only mark where the "
            "optimiser stopped, and no standard errors are reported",
        )
        return fit
    ridge = {n for n, why in report.unidentified.items() if n not in report.fixed}
    analytic = fit.se_method in ("hessian", "robust")
    if ridge and fit.cov_z is None and report.null_space.shape[1] and analytic:
        restricted_covariance(fit, report.null_space, ridge)
    if ridge:
        withhold_standard_errors(
            fit,
            ridge,
            "not identified by these data: "
            + "; ".join(f"{n} ({report.unidentified[n]})" for n in sorted(ridge))
            + "; their standard errors are not reported",
        )
    fit.warnings[:] = [
        w for w in fit.warnings if not any(w.startswith(f"{n} is at (or runs off") for n in ridge)
    ]
    at_bound = set(fit.at_bound) - ridge
    if at_bound:
        withhold_standard_errors(fit, at_bound, None)  # the engine's bound warning stands
    return fit


def fit_identified(model: Any, data: Any, **options: Any) -> Fit:
    """A pooled maximum-likelihood fit with its identification report (module docstring):
    refuse a constant response, fit, hold parameters the data cannot move at their start
    values and refit, then withhold the standard errors the report does not support."""
    refuse_constant_response(model.name, data)
    fit = fit_mle(model, data, **options)
    report = assess(fit, model, data)
    fixes = single_parameter_fixes(report, model, options.get("formulas"))
    if fixes and not report.perfect_prediction:
        held = {**dict(options.pop("fixed", None) or {}), **fixes}
        refit = fit_mle(model, data, fixed=held, **options)
        again = assess(refit, model, data)
        again.unidentified = {**report.unidentified, **again.unidentified}
        again.cannot_move = list(dict.fromkeys(report.cannot_move + again.cannot_move))
        again.fixed = fixes
        refit.notes.append(
            "the data do not identify "
            + ", ".join(fixes)
            + " (see Identification): held fixed at their start values and left out of the "
            "table; the other estimates are conditional on these values"
        )
        fit, report = refit, again
    fit = apply_report(fit, report)
    attach_profiles(fit)
    return fit
