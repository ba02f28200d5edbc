"""Formula fits read on the natural scale: one row per covariate profile and parameter.

A formula puts parameter p on its unconstrained scale, eta_p = x' b_p, with
theta_p = to_natural_p(eta_p) (models/base.py ParamSpec: lo + (hi - lo) / (1 + exp(-eta))
for a range (lo, hi), lo + exp(eta) for (lo, inf), hi - exp(eta) for (-inf, hi)). For each
covariate profile (rows whose design rows agree across every formula):

    Var(eta_p) = x' V_p x            (V_p the covariance of b_p)
    se(theta_p) = |d to_natural / d eta| sqrt(Var(eta_p))       (delta method)
    95% CI     = to_natural(eta_p -+ 1.96 sqrt(Var(eta_p)))     (monotone, inside the bounds)

``scale_text`` states each effect's scale and bounds in words for the summary and JSON.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from stopwise.estimation.formulas import ParamFormula, cells_from_designs
from stopwise.estimation.ml.covariance import NORMAL_95
from stopwise.estimation.ml.prediction import profile_blocks
from stopwise.estimation.ml.problem import Layout, natural_derivative_np, natural_np
from stopwise.models.base import ParamSpec


def bounds_of(spec: ParamSpec) -> list[float | None]:
    """[lower, upper] with None for an infinite bound (JSON has no infinity)."""
    return [b if math.isfinite(b) else None for b in (float(spec.lower), float(spec.upper))]


def scale_text(spec: ParamSpec) -> str:
    """The unconstrained scale of a parameter, with its bounds, in words."""
    lo, hi = spec.lower, spec.upper
    kind = spec.transform
    if kind == "logit":
        return (
            f"logit scale over ({lo:g}, {hi:g}): {spec.name} = {lo:g} + {hi - lo:g} / "
            "(1 + exp(-eta))"
        )
    if kind == "log":
        return f"log scale above {lo:g}: {spec.name} = {lo:g} + exp(eta)"
    if kind == "neglog":
        return f"log scale below {hi:g}: {spec.name} = {hi:g} - exp(eta)"
    return f"natural scale (unbounded): {spec.name} = eta"


def profile_values(designs: Mapping[str, ParamFormula], n_obs: int) -> pd.DataFrame:
    """Covariate values of each in-sample profile (its first row) and its row count."""
    profile, unique = cells_from_designs(designs, n_obs)
    frame = pd.concat([f.values for f in designs.values()], axis=1)
    frame = frame.loc[:, ~frame.columns.duplicated()]
    first = [int(np.flatnonzero(profile == c)[0]) for c in range(len(unique))]
    out = frame.iloc[first].reset_index(drop=True)
    out.insert(0, "profile", np.arange(len(unique)))
    out["n_rows"] = np.bincount(profile, minlength=len(unique))
    return out


def natural_profile_rows(
    layout: Layout,
    z: np.ndarray,
    cov: np.ndarray | None,
    designs: Mapping[str, ParamFormula],
    n_obs: int,
) -> pd.DataFrame:
    """Long table: profile, covariates, n_rows, parameter, estimate, se, ci_low, ci_high,
    lower, upper (module docstring)."""
    values = profile_values(designs, n_obs)
    _, unique = cells_from_designs(designs, n_obs)
    blocks = profile_blocks(layout, designs, unique)
    rows = []
    for spec, off, n, block in zip(layout.specs(), layout.offsets, layout.n_coef, blocks):
        x = np.asarray(block, dtype=float)
        eta = x @ z[off : off + n]
        if cov is None:
            sd_eta = np.full(len(eta), np.nan)
        else:
            v = cov[off : off + n, off : off + n]
            sd_eta = np.sqrt(np.clip(np.einsum("ci,ij,cj->c", x, v, x), 0.0, None))
        estimate = natural_np(spec, eta)
        se = np.abs(natural_derivative_np(spec, eta)) * sd_eta
        half = NORMAL_95 * np.nan_to_num(sd_eta, nan=0.0)[:, None] * np.array([-1.0, 1.0])
        ends = np.where(np.isfinite(sd_eta)[:, None], natural_np(spec, eta[:, None] + half), np.nan)
        low, high = bounds_of(spec)
        for c in range(len(eta)):
            rows.append(
                {
                    **values.iloc[c].to_dict(),
                    "parameter": spec.name,
                    "estimate": float(estimate[c]),
                    "se": float(se[c]),
                    "ci_low": float(np.min(ends[c])),
                    "ci_high": float(np.max(ends[c])),
                    "lower": low,
                    "upper": high,
                }
            )
    return pd.DataFrame(rows)


def attach_profiles(fit: Any) -> None:
    """For a formula fit: ``fit.extras["profiles"]`` (the natural-scale table),
    ``fit.extras["formulas"]`` ({param: rhs}) and ``fit.extras["row_scales"]`` ({row name:
    {"scale": ..., "bounds": [lo, hi]}}) for the JSON and the summary."""
    designs = fit.extras.get("designs")
    layout = fit.extras.get("layout")
    if not designs or layout is None:
        return
    problem = fit.extras["problem"]
    fit.extras["profiles"] = natural_profile_rows(
        layout, np.asarray(fit.z), fit.cov_z, designs, problem.n_obs
    )
    fit.extras["formulas"] = {p: f.rhs for p, f in designs.items()}
    scales = {}
    for r in problem.reported:
        name = r.name.split(":", 1)[0]
        spec = layout.model.spec(name)
        if r.spec is None:
            scale = scale_text(spec)
        elif name in designs:
            scale = "natural, at the reference profile (every covariate term 0)"
        else:
            scale = "natural"
        scales[r.name] = {"scale": scale, "bounds": bounds_of(spec)}
    fit.extras["row_scales"] = scales
