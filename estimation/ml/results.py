"""Result objects: ``Fit`` (one likelihood maximised) and ``FitBySubject`` (one per subject).

``Fit.to_dict()`` has exactly the keys of the DESIGN.md result JSON (model, method, converged,
n_obs, n_subjects, loglik, aic, bic, params, se_method, warnings, versions, seed) plus a few
extra ones (k, clusters, optimizer, notes). AIC = 2k - 2 loglik; BIC = k ln(n_obs) - 2 loglik
(Akaike 1974; Schwarz 1978), with k the number of estimated coefficients and n_obs the number
of decisions (or choices).
"""

from __future__ import annotations

import functools
import importlib.metadata as md
import json
import math
import platform
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.json_text import dumps_json
from stopwise.estimation import tables
from stopwise.estimation.ml import prediction
from stopwise.estimation.ml.covariance import RowTable
from stopwise.estimation.ml.prediction import check_rows_explained, resolve_new_data
from stopwise.estimation.ml.profile import profile_interval

DISCLAIMER = (
    "Research estimates, not a basis for individual financial, clinical or hiring decisions."
)


@functools.lru_cache(maxsize=1)
def package_versions() -> dict[str, str]:
    """Versions of the packages that produced a result."""
    out = {"python": platform.python_version()}
    for name in ("stopwise", "numpy", "scipy", "pandas", "jax", "jaxlib", "statsmodels", "patsy"):
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _num(x: Any) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass
class Fit:
    """A maximum-likelihood fit (see module docstring for AIC/BIC)."""

    model: str
    method: str
    converged: bool
    n_obs: int
    n_subjects: int
    loglik: float
    k: int
    table: RowTable
    se_method: str | None
    warnings: list[str]
    seed: int
    versions: dict[str, str] = field(default_factory=lambda: dict(package_versions()))
    clusters: int | None = None
    optimizer: dict[str, Any] = field(default_factory=dict)
    at_bound: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    z: np.ndarray | None = field(default=None, repr=False)
    cov_z: np.ndarray | None = field(default=None, repr=False)
    predictor: Callable[[Any], dict[str, pd.DataFrame]] | None = field(default=None, repr=False)
    extras: dict[str, Any] = field(default_factory=dict, repr=False)
    identification: Any = field(default=None, repr=False)  # estimation/ml/identification.py

    @property
    def aic(self) -> float:
        return 2.0 * self.k - 2.0 * self.loglik

    @property
    def bic(self) -> float:
        return self.k * math.log(max(self.n_obs, 1)) - 2.0 * self.loglik

    @property
    def params(self) -> pd.DataFrame:
        """One row per reported quantity: estimate, se, ci_low, ci_high (95%), scale."""
        t = self.table
        frame = pd.DataFrame(
            {
                "estimate": t.estimate,
                "se": t.se,
                "ci_low": t.ci_low,
                "ci_high": t.ci_high,
                "scale": t.scale,
            },
            index=pd.Index(t.names, name="name"),
        )
        frame["at_bound"] = [n in self.at_bound for n in t.names]
        return frame

    @property
    def profiles(self) -> pd.DataFrame | None:
        """Formula fits: each covariate profile's parameters on their natural scale with
        delta-method 95% intervals (estimation/ml/natural_profiles.py); None otherwise."""
        table = self.extras.get("profiles")
        return table if isinstance(table, pd.DataFrame) else None

    def estimates(self) -> dict[str, float]:
        return {n: float(v) for n, v in zip(self.table.names, self.table.estimate)}

    def to_dict(self) -> dict[str, Any]:
        t = self.table
        scales = self.extras.get("row_scales", {})
        params = [
            {
                "name": n,
                "estimate": _num(e),
                "se": _num(s),
                "ci_low": _num(lo),
                "ci_high": _num(hi),
                **scales.get(n, {}),
            }
            for n, e, s, lo, hi in zip(t.names, t.estimate, t.se, t.ci_low, t.ci_high)
        ]
        return {
            "model": self.model,
            "method": self.method,
            "converged": bool(self.converged),
            "n_obs": int(self.n_obs),
            "n_subjects": int(self.n_subjects),
            "loglik": _num(self.loglik),
            "aic": _num(self.aic),
            "bic": _num(self.bic),
            "params": params,
            "se_method": self.se_method,
            "warnings": list(self.warnings),
            "versions": dict(self.versions),
            "seed": int(self.seed),
            "k": int(self.k),
            "clusters": self.clusters,
            "at_bound": list(self.at_bound),
            "optimizer": {k: v for k, v in self.optimizer.items() if k != "runs"},
            "notes": list(self.notes),
            **({"max_target": self.extras["max_target"]} if "max_target" in self.extras else {}),
            **(
                {"qre_residual": self.extras["qre_residual"]}
                if "qre_residual" in self.extras
                else {}
            ),
            # sequential contests: likelihood vs independent solver (stopwise/fit_checks)
            **(
                {"sequential_check": self.extras["sequential_check"]}
                if "sequential_check" in self.extras
                else {}
            ),
            **self._type_probabilities(),
            **self._formula_keys(),
            **(
                {"identification": self.identification.to_dict()}
                if self.identification is not None
                else {}
            ),
            **self.extras.get("record", {}),  # spec, options, data fingerprint (stopwise.saved)
            **self._coefficients(),
        }

    def _formula_keys(self) -> dict[str, Any]:
        """Formula fits: {"formulas": {param: rhs}, "profiles": [natural-scale rows]}."""
        if self.profiles is None:
            return {}
        return {
            "formulas": dict(self.extras.get("formulas", {})),
            "profiles": [
                {k: _plain(v) if not isinstance(v, float) else _num(v) for k, v in row.items()}
                for row in self.profiles.to_dict(orient="records")
            ],
        }

    def _coefficients(self) -> dict[str, Any]:
        """{"coefficients": {"z", "covariance"}}: the optimum on the unconstrained scale and
        its covariance matrix (null entries where not estimated); {} without them."""
        if self.z is None:
            return {}
        cov = None if self.cov_z is None else np.asarray(self.cov_z, dtype=float).tolist()
        return {"coefficients": {"z": np.asarray(self.z, dtype=float).tolist(), "covariance": cov}}

    def _type_probabilities(self) -> dict[str, Any]:
        """A mixture's per-subject type probabilities: {"type_probabilities": [{"subject":
        s, "type1": p1, ...}, ...]}; {} for other fits."""
        table = self.extras.get("posterior")
        if not isinstance(table, pd.DataFrame):
            return {}
        return {
            "type_probabilities": [
                {"subject": _plain(s), **{c: _num(v) for c, v in row.items()}}
                for s, row in table.iterrows()
            ]
        }

    def to_json(self) -> str:
        return dumps_json(self.to_dict())

    def to_latex(self, interval: str = "se") -> str:
        """This fit as a booktabs table (estimation/tables.py; several fits side by side:
        tables.to_latex([fit1, fit2]))."""
        return tables.to_latex([self], interval)

    def to_markdown(self, interval: str = "se") -> str:
        """This fit as a Markdown pipe table (estimation/tables.py)."""
        return tables.to_markdown([self], interval)

    def predict(
        self, data: Any = None, *, covariates: pd.DataFrame | None = None
    ) -> dict[str, pd.DataFrame]:
        """Choice probabilities per row ("rows") and, for stopping data, the predicted
        distribution of the step at which a trial ends per condition ("stop_steps").

        ``data``: None (the fitted rows) or new rows: a file path, a DataFrame, a loaded
        Dataset or an array bundle. A fit with covariate formulas builds the new rows'
        designs with the fit's levels and centring, reads the covariate columns from the
        new frame (or from ``covariates``, a frame aligned with a bundle's rows), adds a
        ``profile`` column and a "profiles" frame (estimation/ml/prediction.py)."""
        if self.predictor is None:
            raise ValueError("this fit has no predictor (it was not made from a model)")
        designs = self.extras.get("designs")
        if not designs:
            if data is not None:
                if not _is_bundle(data):
                    data, _ = resolve_new_data(data, covariates)
                if "layout" in self.extras:
                    check_rows_explained(self.extras["layout"].model, data)
            return self.predictor(data)
        layout = self.extras["layout"]
        if data is None:
            if covariates is not None:
                raise StopwiseInputError("covariates= goes with new data, not the fitted rows")
            return prediction.in_sample_profiles(self.predictor(None), layout, self.z, designs)
        return prediction.predict_formula_fit(
            layout.model, layout, self.z, designs, data, covariates
        )

    def profile(self, name: str, level: float = 0.95) -> tuple[float, float]:
        """Profile-likelihood interval of parameter ``name`` (estimation/ml/profile.py)."""
        return profile_interval(self, name, level)

    def _scale_lines(self, frame: pd.DataFrame) -> list[str]:
        """Where effects are not on the natural scale: each parameter's scale and bounds,
        then the natural-scale profile table of a formula fit."""
        if all(s == "natural" for s in frame["scale"]):
            return []
        scales = self.extras.get("row_scales", {})
        stated = {n.split(":", 1)[0]: v["scale"] for n, v in scales.items() if ":" in n}
        lines = [f"Effects on {p} (named {p}:column) are on the {s}." for p, s in stated.items()]
        if not stated:
            lines.append(
                "Effects named param:column are on the unconstrained scale "
                "(log for positive parameters, logit for bounded ones)."
            )
        if self.profiles is not None:
            lines += ["", "Each covariate profile on the natural scale (delta-method 95% CI)"]
            shown = self.profiles.drop(columns=["lower", "upper"])
            lines.append(shown.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
        return lines

    def summary(self) -> str:
        """A plain-text table for a paper's appendix."""
        lines = [
            f"Model: {self.model}    Method: {self.method}    SE: {self.se_method or 'none'}",
            f"Observations: {self.n_obs}    Subjects: {self.n_subjects}    "
            f"Clusters: {self.clusters if self.clusters is not None else '-'}",
            f"Log-likelihood: {self.loglik:.4f}    k: {self.k}    AIC: {self.aic:.2f}    "
            f"BIC: {self.bic:.2f}",
            f"Converged: {'yes' if self.converged else 'NO'}"
            + (
                f"    max|gradient|: {self.optimizer['grad_norm']:.2e}"
                if "grad_norm" in self.optimizer
                else ""
            )
            + (
                f"    iterations: {self.optimizer['iterations']}"
                if "iterations" in self.optimizer
                else ""
            ),
        ]
        if "sequential_check" in self.extras:  # sequential contests (stopwise/fit_checks)
            lines.append(
                "Sequential play checked by an independent solver: max |difference| of stop "
                f"probabilities {self.extras['sequential_check']:.2e}"
            )
        if "starts" in self.optimizer:
            outcomes = list(self.optimizer.get("start_outcomes", []))
            counts = (
                f" ({outcomes.count('best')} at the best, {outcomes.count('lower optimum')} "
                f"at a lower optimum, {outcomes.count('not converged')} not converged)"
                if outcomes
                else ""
            )
            lines.append(
                f"Starts: {self.optimizer['starts']}{counts}    spread of converged optima "
                f"(loglik): {self.optimizer.get('spread', 0.0):.3g}"
            )
        frame = self.params
        width = max([len("parameter")] + [len(str(n)) for n in frame.index])
        header = f"{'parameter':<{width}}  {'estimate':>11}  {'se':>10}  {'95% CI':>25}"
        rule = "-" * len(header)
        lines += [rule, header, rule]
        for name, row in frame.iterrows():
            ci = f"[{row.ci_low:.4g}, {row.ci_high:.4g}]" if np.isfinite(row.ci_low) else "-"
            flag = "  (at bound)" if row.at_bound else ""
            se = f"{row.se:10.4g}" if np.isfinite(row.se) else f"{'nan':>10}"
            lines.append(f"{name:<{width}}  {row.estimate:11.5g}  {se}  {ci:>25}{flag}")
        lines.append(rule)
        lines += self._scale_lines(frame)
        if self.identification is not None:
            lines.append(self.identification.summary_line())
        for note in self.notes:
            lines.append(f"Note: {note}")
        for w in self.warnings:
            lines.append(f"Warning: {w}")
        lines.append(DISCLAIMER)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


@dataclass
class FitBySubject:
    """Per-subject fits; ``params`` is a long frame (subject, name, estimate, se, ...)."""

    model: str
    fits: list[tuple[Any, Fit]]
    flags: dict[Any, list[str]]
    seed: int
    warnings: list[str] = field(default_factory=list)
    extras: dict[str, Any] = field(default_factory=dict)  # "record": spec, data fingerprint

    @property
    def params(self) -> pd.DataFrame:
        frames = []
        for subject, fit in self.fits:
            f = fit.params.reset_index()
            f.insert(0, "subject", subject)
            f["converged"] = fit.converged
            f["flags"] = "; ".join(self.flags.get(subject, []))
            frames.append(f)
        return pd.concat(frames, ignore_index=True)

    def to_dict(self) -> dict[str, Any]:
        return {
            "by": "subject",
            "model": self.model,
            "warnings": list(self.warnings),
            "fits": [
                {"subject": _plain(s), **f.to_dict(), "flags": self.flags.get(s, [])}
                for s, f in self.fits
            ],
            **self.extras.get("record", {}),  # spec, options, data fingerprint (stopwise.saved)
        }

    def to_json(self) -> str:
        return dumps_json(self.to_dict())

    def summary(self) -> str:
        """Distribution of estimates across subjects and the flagged subjects."""
        frame = self.params
        lines = [
            f"Model: {self.model}    per-subject maximum likelihood    subjects: {len(self.fits)}",
            f"converged: {sum(f.converged for _, f in self.fits)}    flagged: "
            f"{sum(bool(v) for v in self.flags.values())}",
        ]
        desc = frame.groupby("name", sort=False)["estimate"].describe(percentiles=[0.25, 0.5, 0.75])
        lines.append(
            desc[["count", "mean", "std", "25%", "50%", "75%"]].to_string(
                float_format=lambda v: f"{v:.4g}"
            )
        )
        flagged = [(s, v) for s, v in self.flags.items() if v]
        for s, v in flagged[:20]:
            lines.append(f"subject {s}: {'; '.join(v)}")
        if len(flagged) > 20:
            lines.append(f"... and {len(flagged) - 20} more flagged subjects")
        lines += [f"Warning: {w}" for w in self.warnings]
        lines.append(DISCLAIMER)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def _is_bundle(data: Any) -> bool:
    return isinstance(data, (StoppingData, LotteryData))


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    return value


def json_roundtrip(obj: Any) -> Any:
    """Parse the JSON text of a result (tests and the command line use this)."""
    return json.loads(obj.to_json())
