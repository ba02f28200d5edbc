"""Model comparison on one data set.

* Information criteria: AIC = 2k - 2 ln L (Akaike 1974), BIC = k ln n - 2 ln L (Schwarz 1978).
* Likelihood-ratio test for nested specs: LR = 2 (ln L_big - ln L_small) ~ chi2(k_big -
  k_small) under the null (Wilks 1938). When the restriction puts a parameter on the edge of
  its range (e.g. a tremble of 0) the chi2 reference is conservative (Self & Liang 1987).
References are cited from memory.
* Vuong (1989) test for non-nested specs, with subjects as the independent units: d_g =
  ln L_A,g - ln L_B,g, Schwarz-corrected LR~ = sum_g d_g - (k_A - k_B) ln(G) / 2, and
  Z = LR~ / (sqrt(G) sd(d)) ~ N(0, 1); Z > 0 favours A.
* Clarke (2007) distribution-free test: B = #{g: d_g - (k_A - k_B) ln(G) / (2G) > 0} ~
  Binomial(G, 1/2) under the null; two-sided p-value.
* Subject-level k-fold cross-validation: subjects are split into k folds; each fold's
  held-out log-likelihood is computed at the estimate from the other folds; the log score
  is the sum over folds (higher is better).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from stopwise.estimation.mle import build_problem, fit_mle, optimise, start_design
from stopwise.estimation.results import DISCLAIMER, Fit


@dataclass
class Comparison:
    """Table of fits (one row per model) and pairwise tests."""

    table: pd.DataFrame
    tests: pd.DataFrame
    fits: list[Fit]
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {
            "models": self.table.reset_index().to_dict(orient="records"),
            "tests": self.tests.to_dict(orient="records"),
            "fits": [f.to_dict() for f in self.fits],
            "notes": list(self.notes),
        }

    def summary(self) -> str:
        lines = [
            "Model comparison (best AIC first)",
            self.table.to_string(float_format=lambda v: f"{v:.3f}"),
        ]
        if len(self.tests):
            lines += [
                "",
                "Pairwise tests",
                self.tests.to_string(index=False, float_format=lambda v: f"{v:.4g}"),
            ]
        lines += [f"Note: {n}" for n in self.notes]
        for f in self.fits:
            lines += [f"Warning ({f.model}): {w}" for w in f.warnings]
        lines.append(DISCLAIMER)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def subject_logliks(fit: Fit) -> np.ndarray:
    """ln L_g at the estimate for every subject g."""
    problem = fit.extras["problem"]
    return problem.cluster_loglik(fit.z)


def cv_log_score(
    model: Any,
    data: Any,
    folds: int,
    seed: int,
    starts: int = 1,
    formulas: Any = None,
    covariate_frame: Any = None,
) -> float:
    """Sum over folds of the held-out subjects' log-likelihood at the estimate from the
    other folds (module docstring)."""
    problem, _layout, _ = build_problem(
        model, data, formulas=formulas, covariate_frame=covariate_frame
    )
    g = problem.n_clusters
    rng = np.random.default_rng(seed)
    fold_of = rng.permutation(np.arange(g) % folds)
    starts_m = start_design(problem.z0, starts, seed)
    total = 0.0
    for f in range(folds):
        train = problem.cluster_weights((fold_of != f).astype(float))
        best, _ = optimise(problem, starts_m, weights=train)
        held = problem.cluster_loglik(best.z)[fold_of == f]
        total += float(held.sum())
    return total


def nested_pair(model_a: Any, model_b: Any, a: Fit, b: Fit) -> bool:
    """Treat A as nested in B when A's parameter names are a strict subset of B's and both
    share the stopping policy and the noise rule (the last part of the spec); a heuristic
    stated in the output, since nesting is a property of the maths, not of the names."""
    same_policy = model_a.options.get("policy") == model_b.options.get("policy")
    same_noise = model_a.name.split("+")[-1] == model_b.name.split("+")[-1]
    return (
        set(model_a.param_names) < set(model_b.param_names)
        and a.k < b.k
        and same_policy
        and same_noise
    )


def pairwise_tests(fits: Sequence[Fit], models: Sequence[Any]) -> tuple[pd.DataFrame, list[str]]:
    """LR tests for pairs whose parameter names nest, Vuong and Clarke tests otherwise."""
    notes: list[str] = []
    rows = []
    per_subject = [subject_logliks(f) for f in fits]
    for i in range(len(fits)):
        for j in range(i + 1, len(fits)):
            a, b = fits[i], fits[j]
            ma, mb = models[i], models[j]
            if nested_pair(ma, mb, a, b) or nested_pair(mb, ma, b, a):
                small, big = (a, b) if a.k < b.k else (b, a)
                lr = 2.0 * (big.loglik - small.loglik)
                df = big.k - small.k
                rows.append(
                    {
                        "model_a": small.model,
                        "model_b": big.model,
                        "test": "likelihood ratio",
                        "statistic": lr,
                        "df": df,
                        "p_value": float(stats.chi2.sf(max(lr, 0.0), df)),
                        "favours": big.model
                        if stats.chi2.sf(max(lr, 0.0), df) < 0.05
                        else small.model,
                    }
                )
                notes.append(
                    f"{small.model} is treated as nested in {big.model} (its parameters are a "
                    "subset, same policy and noise rule); the chi-squared reference is conservative when the restriction "
                    "sits on the boundary of a parameter's range (Self & Liang 1987)"
                )
            else:
                vu = vuong_test(per_subject[i], per_subject[j], a.k, b.k)
                cl = clarke_test(per_subject[i], per_subject[j], a.k, b.k)
                for name, (stat, p) in (
                    ("Vuong (Schwarz-corrected)", vu),
                    ("Clarke sign (Schwarz-corrected)", cl),
                ):
                    favours = "neither"
                    if p < 0.05:
                        better = (
                            stat > 0 if name.startswith("Vuong") else stat > len(per_subject[i]) / 2
                        )
                        favours = a.model if better else b.model
                    rows.append(
                        {
                            "model_a": a.model,
                            "model_b": b.model,
                            "test": name,
                            "statistic": stat,
                            "df": np.nan,
                            "p_value": p,
                            "favours": favours,
                        }
                    )
    return pd.DataFrame(
        rows, columns=["model_a", "model_b", "test", "statistic", "df", "p_value", "favours"]
    ), notes


def vuong_test(ll_a: np.ndarray, ll_b: np.ndarray, k_a: int, k_b: int) -> tuple[float, float]:
    """Vuong Z with Schwarz correction over G units and its two-sided p-value."""
    d = np.asarray(ll_a) - np.asarray(ll_b)
    g = len(d)
    corrected = d.sum() - (k_a - k_b) * np.log(g) / 2.0
    sd = d.std(ddof=0)
    if g < 2 or sd == 0:
        return float("nan"), float("nan")
    z = corrected / (np.sqrt(g) * sd)
    return float(z), float(2.0 * stats.norm.sf(abs(z)))


def clarke_test(ll_a: np.ndarray, ll_b: np.ndarray, k_a: int, k_b: int) -> tuple[float, float]:
    """Clarke's B = number of units favouring A after the per-unit Schwarz correction, and
    its two-sided binomial p-value."""
    d = np.asarray(ll_a) - np.asarray(ll_b)
    g = len(d)
    corrected = d - (k_a - k_b) * np.log(g) / (2.0 * g)
    b = int((corrected > 0).sum())
    p = float(stats.binomtest(b, g, 0.5).pvalue) if g > 0 else float("nan")
    return float(b), p


def compare_fits(
    models: Sequence[Any],
    data: Any,
    *,
    se: str | None = "auto",
    cv_folds: int = 5,
    seed: int = 0,
    starts: int = 3,
    formulas: Any = None,
    covariate_frame: Any = None,
    progress: bool = False,
) -> Comparison:
    """Fit every model to the same data and compare (module docstring)."""
    fits = [
        fit_mle(
            m,
            data,
            se=se,
            seed=seed,
            starts=starts,
            formulas=formulas,
            covariate_frame=covariate_frame,
            progress=progress,
        )
        for m in models
    ]
    rows = []
    for m, f in zip(models, fits):
        row = {
            "model": f.model,
            "loglik": f.loglik,
            "k": f.k,
            "aic": f.aic,
            "bic": f.bic,
            "converged": f.converged,
        }
        if cv_folds and cv_folds > 1 and data.n_subjects >= cv_folds:
            row[f"cv_log_score_{cv_folds}fold"] = cv_log_score(
                m, data, cv_folds, seed, formulas=formulas, covariate_frame=covariate_frame
            )
        rows.append(row)
    table = pd.DataFrame(rows).set_index("model")
    table["delta_aic"] = table["aic"] - table["aic"].min()
    weights = np.exp(-0.5 * table["delta_aic"].to_numpy())
    table["aic_weight"] = weights / weights.sum()
    table = table.sort_values("aic")
    tests, notes = pairwise_tests(fits, models)
    if cv_folds and data.n_subjects < cv_folds:
        notes.append(
            f"cross-validation skipped: fewer subjects ({data.n_subjects}) than folds ({cv_folds})"
        )
    notes.append("AIC weights: exp(-dAIC/2) normalised (Burnham & Anderson 2002, from memory)")
    return Comparison(table=table, tests=tests, fits=fits, notes=notes)
