"""Model comparison on one data set.

* Information criteria: AIC = 2k - 2 ln L (Akaike 1974), BIC = k ln n - 2 ln L (Schwarz 1978).
* Every pair is first classified as nested (restriction named), overlapping or non-nested
  (estimation/nesting.py); nested pairs get a likelihood-ratio test with the chi2 or
  chi-bar-square reference, the others Vuong's and Clarke's tests, and pairs whose
  per-subject log-likelihoods agree to rounding level read "indistinguishable"
  (estimation/pair_tests.py).
* ΔAIC to the best model with its standard error over subjects, 2 sqrt(G) sd(d_g)
  (estimation/aic_difference.py).
* Subject-level k-fold cross-validation: subjects are split into k folds; each fold's
  held-out log-likelihood is computed at the estimate from the other folds; the log score
  is the sum over folds (higher is better). Folds use the full fit's multistart design (all
  folds x starts of one model run as one compiled program, estimation/ml/compiled_multistart.py);
  a fold whose fit does not converge makes the score NaN, with a warning.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from stopwise.estimation.aic_difference import delta_aic_ses
from stopwise.estimation.distributed import plan_for, run_tasks
from stopwise.estimation.ml.compiled_multistart import compiled_multistart, compiled_path_suits
from stopwise.estimation.ml.identification import fit_identified
from stopwise.estimation.ml.mle import build_problem, optimise, start_design
from stopwise.estimation.ml.response import _strip
from stopwise.estimation.ml.results import DISCLAIMER, Fit
from stopwise.estimation.nesting import Relation, classify, verify_nesting
from stopwise.estimation.pair_tests import (
    LEVEL,
    ROW_TOLERANCE,
    clarke_test,
    indistinguishable,
    likelihood_ratio,
    subject_scales,
    vuong_test,
)


@dataclass
class Comparison:
    """Table of fits (one row per model) and pairwise tests."""

    table: pd.DataFrame
    tests: pd.DataFrame
    fits: list[Fit]
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {
            "models": self.table.reset_index().to_dict(orient="records"),
            "tests": self.tests.to_dict(orient="records"),
            "fits": [f.to_dict() for f in self.fits],
            "notes": list(self.notes),
            "warnings": list(self.warnings),
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
        lines += [f"Warning: {w}" for w in self.warnings]
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


def subject_rows(fit: Fit) -> np.ndarray:
    """n_g, the decision rows of every subject g (padding rows excluded)."""
    problem = fit.extras["problem"]
    counted = (np.asarray(problem.weights) > 0).astype(float)
    return np.bincount(problem.cluster, weights=counted, minlength=problem.n_clusters)


@dataclass
class CrossValidation:
    """Subject-level k-fold log score: the sum over folds, NaN when a fold's fit did not
    converge (a score from a non-converged optimiser would come from start values)."""

    score: float
    fold_logliks: list[float]
    fold_converged: list[bool]
    warnings: list[str]


@dataclass(frozen=True)
class FoldPayload:
    """What every cross-validation fold shares: the problem, the fold of each subject, the
    multistart design and the iteration cap."""

    problem: Any
    fold_of: np.ndarray
    starts: np.ndarray
    max_iter: int


def fit_fold(fold: int, payload: FoldPayload) -> tuple[float, bool, float]:
    """One fold (a task of the study runner): fit with the fold's subjects weighted 0, then
    (sum of their log-likelihoods at that estimate, converged, max |gradient|)."""
    problem = payload.problem
    train = problem.cluster_weights((payload.fold_of != fold).astype(float))
    best, _ = optimise(problem, payload.starts, payload.max_iter, weights=train)
    held_out = float(problem.cluster_loglik(best.z)[payload.fold_of == fold].sum())
    return held_out, bool(best.converged), float(best.grad_norm)


def all_folds_at_once(payload: FoldPayload, folds: int) -> list[tuple[float, bool, float]]:
    """Every fold x start in one compiled call (estimation/ml/compiled_multistart.py); per fold
    the same (held-out log-likelihood, converged, max |gradient|) as ``fit_fold``."""
    problem, fold_of = payload.problem, payload.fold_of
    train = [problem.cluster_weights((fold_of != f).astype(float)) for f in range(folds)]
    fold_runs = compiled_multistart(problem, payload.starts, payload.max_iter, train)
    return [
        (
            float(problem.cluster_loglik(best.z)[fold_of == f].sum()),
            bool(best.converged),
            float(best.grad_norm),
        )
        for f, (best, _) in enumerate(fold_runs)
    ]


def cv_log_score(
    model: Any,
    data: Any,
    folds: int,
    seed: int,
    starts: int = 3,
    formulas: Any = None,
    covariate_frame: Any = None,
    max_iter: int = 200,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> CrossValidation:
    """Sum over folds of the held-out subjects' log-likelihood at the estimate from the
    other folds (module docstring); every fold uses the full fit's multistart design. In
    process, all folds x starts run as one compiled call (``all_folds_at_once``); on a
    cluster (``workers``/``scheduler``: estimation/distributed.py) each fold is one task."""
    problem, _layout, _ = build_problem(
        model, data, formulas=formulas, covariate_frame=covariate_frame
    )
    g = problem.n_clusters
    rng = np.random.default_rng(seed)
    fold_of = rng.permutation(np.arange(g) % folds)
    starts_m = start_design(problem.z0, max(int(starts), 1), seed)
    payload = FoldPayload(problem, fold_of, starts_m, max_iter)
    plan = plan_for(workers, scheduler, folds)
    failures: list[Any] = []
    if plan.kind == "in-process" and compiled_path_suits(problem.rows):
        results: list[Any] = all_folds_at_once(payload, folds)  # one device call
    else:
        run = run_tasks(
            fit_fold,
            [{"fold": f} for f in range(folds)],
            workers=workers,
            scheduler=scheduler,
            progress=False,
            desc="cv folds",
            shared={"payload": payload},
        )
        results, failures = list(run.results), list(run.failures)
    held_out, converged, warnings = [], [], []
    for f, result in enumerate(results):
        held, ok, grad = result if result is not None else (float("nan"), False, float("nan"))
        held_out.append(held)
        converged.append(ok)
        if not ok:
            warnings.append(
                f"{model.name}: cross-validation fold {f + 1} of {folds} did not converge "
                f"from {len(starts_m)} starts (max |gradient| {grad:.3g}); its "
                "log score is not reported (NaN)"
            )
    warnings += [f"{model.name}: {failure.describe()}" for failure in failures]
    score = float(np.sum(held_out)) if all(converged) else float("nan")
    return CrossValidation(score, held_out, converged, warnings)


PAIR_COLUMNS = [
    "model_a",
    "model_b",
    "relation",
    "restriction",
    "test",
    "statistic",
    "df",
    "p_value",
    "favours",
]


def pairwise_tests(
    fits: Sequence[Fit], models: Sequence[Any], data: Any = None, verify: bool = True
) -> tuple[pd.DataFrame, list[str]]:
    """Every pair classified (estimation/nesting.py), then tested (estimation/pair_tests.py):
    a likelihood-ratio test for verified nested pairs, Vuong and Clarke otherwise, and
    "indistinguishable" when the per-subject differences vanish."""
    notes: list[str] = []
    rows: list[dict[str, Any]] = []
    per_subject = [subject_logliks(f) for f in fits]
    rows_of = subject_rows(fits[0]) if fits else None
    for i in range(len(fits)):
        for j in range(i + 1, len(fits)):
            relation = classify(models[i], models[j])
            unconverged = [f.model for f in (fits[i], fits[j]) if not f.converged]
            if unconverged:
                rows.append(_refused_row(relation, fits[i], fits[j], unconverged))
                continue
            if relation.kind == "nested":
                pair = (i, j)
                small, big = pair[relation.small], pair[relation.big]
                lr_rows, lr_notes, ok = _nested_rows(
                    relation, fits[small], fits[big], models[big], data, verify
                )
                notes += lr_notes
                if ok:
                    rows += lr_rows
                    continue
                relation = classify_fallback(relation)
            pair_rows, pair_notes = _non_nested_rows(
                relation, fits[i], fits[j], per_subject[i], per_subject[j], rows_of
            )
            rows += pair_rows
            notes += pair_notes
            if relation.kind == "overlapping":
                notes.append(
                    f"{fits[i].model} and {fits[j].model} overlap: {relation.reason}; Vuong's "
                    "test applies once the two differ on these data (Vuong 1989, from memory)"
                )
    return pd.DataFrame(rows, columns=PAIR_COLUMNS), notes


def _refused_row(relation: Relation, a: Fit, b: Fit, unconverged: list[str]) -> dict[str, Any]:
    """No test between fits whose optimiser did not converge: their log-likelihoods are not
    maxima, so any statistic would compare wherever the optimisers stopped."""
    return {
        "model_a": a.model,
        "model_b": b.model,
        "relation": relation.kind,
        "restriction": relation.restriction_text(),
        "test": "none",
        "statistic": np.nan,
        "df": np.nan,
        "p_value": np.nan,
        "favours": f"refused: {' and '.join(unconverged)} did not converge",
    }


def classify_fallback(relation: Relation) -> Relation:
    """A nesting claim that failed its check is tested as non-nested."""
    return Relation("non-nested", reason="claimed nesting not confirmed on the data")


def _nested_rows(
    relation: Relation, small: Fit, big: Fit, big_model: Any, data: Any, verify: bool
) -> tuple[list[dict[str, Any]], list[str], bool]:
    """The likelihood-ratio row of a nested pair, after two checks: the restriction
    reproduces the small model's log-likelihood (when the fits have no formulas), and the
    big fit is not below the small one."""
    notes = []
    text = relation.restriction_text()
    if verify and data is not None and not small.extras.get("designs"):
        small_theta = {**dict(small.extras["layout"].fixed), **small.estimates()}
        agree, gap = verify_nesting(
            big_model, small_theta, relation.restriction, _strip(data), small.loglik
        )
        if not agree:
            notes.append(
                f"{small.model} is not {big.model} at {text} on these data (log-likelihoods "
                f"differ by {gap:.3g}): tested as non-nested"
            )
            return [], notes, False
        verified = "verified on the data"
    else:
        verified = "by structure (formula fits are not re-evaluated)"
    base = {
        "model_a": small.model,
        "model_b": big.model,
        "relation": "nested",
        "restriction": text,
    }
    tolerance = 1e-6 * (1.0 + abs(small.loglik))
    if big.loglik < small.loglik - tolerance:
        notes.append(
            f"{big.model} fits worse than its restriction {small.model} "
            f"({big.loglik:.6g} < {small.loglik:.6g}): its optimiser stopped short; the "
            "likelihood-ratio test is refused (refit with more starts)"
        )
        row = {**base, "test": "likelihood ratio", "statistic": np.nan, "df": np.nan}
        return [{**row, "p_value": np.nan, "favours": "refused"}], notes, True
    free_in_big = set(big.extras["layout"].free) if "layout" in big.extras else None
    restricted = [p for p in relation.restriction if free_in_big is None or p in free_in_big]
    df = len(restricted)
    if df == 0:
        notes.append(
            f"every parameter that links {small.model} to {big.model} is held fixed in the "
            "bigger fit (not identified): the two are compared as non-nested"
        )
        return [], notes, False
    boundary = [p for p in relation.boundary if p in restricted]
    lr = likelihood_ratio(small.loglik, big.loglik, df, len(boundary))
    favours = big.model if float(lr["p_value"]) < LEVEL else small.model
    notes.append(
        f"{small.model} is nested in {big.model} at {text} ({verified}); reference "
        f"distribution {lr['reference']}"
    )
    row = {**base, "test": "likelihood ratio", "statistic": lr["statistic"], "df": df}
    return [{**row, "p_value": lr["p_value"], "favours": favours}], notes, True


def _non_nested_rows(
    relation: Relation,
    a: Fit,
    b: Fit,
    ll_a: np.ndarray,
    ll_b: np.ndarray,
    rows: np.ndarray | None = None,
) -> tuple[list[dict[str, Any]], list[str]]:
    """Vuong and Clarke rows, or one "indistinguishable" row when the differences are at
    rounding level (estimation/pair_tests.py); each with a note that states its check."""
    base = {
        "model_a": a.model,
        "model_b": b.model,
        "relation": relation.kind,
        "restriction": relation.common and f"both reduce to {relation.common}",
    }
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    scales = subject_scales(ll_a, ll_b, rows)
    per_row_gap = float(np.max(np.abs(d) / scales, initial=0.0))
    if indistinguishable(ll_a, ll_b, rows):
        note = (
            f"{a.model} and {b.model} are indistinguishable on these data: the summed "
            f"log-likelihoods differ by {abs(float(d.sum())):.3g}, the largest per-subject "
            f"difference is {per_row_gap:.3g} per decision row and their sd "
            f"{float(d.std(ddof=0)):.3g} (rounding level: {ROW_TOLERANCE:g} per row); "
            "Vuong's and Clarke's tests would divide by rounding noise"
        )
        row = {**base, "test": "per-subject differences", "statistic": float(np.abs(d).max())}
        return [{**row, "df": np.nan, "p_value": np.nan, "favours": "indistinguishable"}], [note]
    out, notes = [], []
    g = len(ll_a)
    for name, (stat, p) in (
        ("Vuong (Schwarz-corrected)", vuong_test(ll_a, ll_b, a.k, b.k, rows)),
        ("Clarke sign (Schwarz-corrected)", clarke_test(ll_a, ll_b, a.k, b.k, rows)),
    ):
        favours = "neither" if np.isfinite(stat) else "not computed (differences at rounding level)"
        if np.isfinite(p) and p < LEVEL:
            untied = int((np.abs(d) > ROW_TOLERANCE * scales).sum())
            better = stat > 0 if name.startswith("Vuong") else stat > untied / 2
            favours = a.model if better else b.model
        out.append(
            {
                **base,
                "test": name,
                "statistic": stat,
                "df": np.nan,
                "p_value": p,
                "favours": favours,
            }
        )
    penalty = (a.k - b.k) * np.log(g) / 2.0 if g else 0.0
    if penalty and abs(float(d.sum())) < abs(penalty) and np.isfinite(out[0]["statistic"]):
        notes.append(
            f"{a.model} vs {b.model}: the fits differ by {float(d.sum()):.3g} in total, less "
            f"than the Schwarz term {penalty:.3g} in Vuong's statistic, so its sign is set by "
            "the parameter count: |Z| then measures how surely the extra parameters fail to "
            "pay for themselves, not how much the predictions differ"
        )
    return out, notes


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
    max_iter: int = 200,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> Comparison:
    """Fit every model to the same data and compare (module docstring); the
    cross-validation folds run where ``workers``/``scheduler`` say."""
    fits = [
        fit_identified(
            m,
            data,
            se=se,
            seed=seed,
            starts=starts,
            formulas=formulas,
            covariate_frame=covariate_frame,
            progress=progress,
            max_iter=max_iter,
        )
        for m in models
    ]
    rows: list[dict[str, Any]] = []
    cv_warnings: list[str] = []
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
            cv = cv_log_score(
                m,
                data,
                cv_folds,
                seed,
                starts=starts,
                formulas=formulas,
                covariate_frame=covariate_frame,
                max_iter=max_iter,
                workers=workers,
                scheduler=scheduler,
            )
            row[f"cv_log_score_{cv_folds}fold"] = cv.score
            cv_warnings += cv.warnings
        rows.append(row)
    table = pd.DataFrame(rows).set_index("model")
    table["delta_aic"] = table["aic"] - table["aic"].min()
    table["delta_aic_se"] = delta_aic_ses(
        [subject_logliks(f) for f in fits], [f.aic for f in fits], [f.converged for f in fits]
    )
    weights = np.exp(-0.5 * table["delta_aic"].to_numpy())
    table["aic_weight"] = weights / weights.sum()
    table = table.sort_values("aic")
    tests, notes = pairwise_tests(fits, models, data)
    if cv_folds and data.n_subjects < cv_folds:
        notes.append(
            f"cross-validation skipped: fewer subjects ({data.n_subjects}) than folds ({cv_folds})"
        )
    notes.append(
        "delta_aic_se: SE of AIC_m - AIC_best over subjects, 2 sqrt(G) sd(d_g) with d_g the "
        f"per-subject log-likelihood difference, G = {data.n_subjects} (estimation/"
        "aic_difference.py); -delta_aic/SE is Vuong's AIC-corrected Z (Vuong 1989, from memory)"
    )
    notes.append("AIC weights: exp(-dAIC/2) normalised (Burnham & Anderson 2002, from memory)")
    return Comparison(table=table, tests=tests, fits=fits, notes=notes, warnings=cv_warnings)
