"""The count reduction for pooled fits of solo stopping models without per-row covariates.

Such a model's log-likelihood of decision row i depends on the row only through its key
u_i = (subject, p_survive, gain, start, bust_keep, step, action, outcome): every stopping
model tabulates log P(draw | condition, step) and log P(stop | ...) per condition and gathers
by (condition, step) (DEVELOPERS.md). Hence, with n_u the number of rows with key u,

    sum_i ll(theta; row_i) = sum_u n_u ll(theta; u),

and the score and Hessian follow the same weighted sum, so estimates, Hessian and
subject-clustered standard errors (the subject is part of the key) are those of the
row-level fit. Data of any size reduce to at most subjects x conditions x steps x 3 rows.

``reduction_gap`` certifies the identity for a given model on given rows (the row-level and
the count log-likelihood at several parameter values); a model whose rows carry more than
the key (per-trial effects, learning, contest play) fails it and must be fitted on rows.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas import columns as C
from stopwise.data_schemas.arrow_screen import KeyArrays, screen_part
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.partitioned import PartCheck, check_part
from stopwise.estimation.ml.count_tables import (
    COUNT_COLUMN,
    KEY_COLUMNS,
    OUTCOME_LABELS,
    CountTable,
    check_key_space,
    merge_tables,
    sum_by_key,
)
from stopwise.estimation.ml.mle import build_problem, run_fit, starts_from
from stopwise.estimation.ml.results import Fit

EXACT_TOLERANCE = 1e-9  # on |ll_rows - ll_counts| / max(1, |ll_rows|)
# Columns whose presence means rows carry more than the key (contest play, pools, odds,
# sequential moves): such data are fitted on rows.
ROW_ONLY_COLUMNS = ("group", "pool_size", "pool_bad", "odds_known", "order", "rival_bank")
DEFAULTS = {"start": 0.0, "bust_keep": 0.0}


def counts_refusal(model: Any, frame_columns: Iterable[str], formulas: Any = None) -> str | None:
    """Why the count reduction cannot serve this model and data (None when it can)."""
    if getattr(model, "data_kind", None) != "stopping":
        return f"{model.name} is not a solo stopping model"
    if formulas:
        return "formulas give each row its own parameters"
    present = sorted(set(frame_columns) & set(ROW_ONLY_COLUMNS))
    if present:
        return f"the data have column(s) {', '.join(present)} that the count key does not carry"
    return None


def _key_codes(frame: pd.DataFrame, column: str) -> tuple[np.ndarray, np.ndarray]:
    """(integer code per row, label per code) of one key column; a missing optional column
    takes its default, an empty outcome the label ""."""
    if column not in frame.columns:
        return np.zeros(len(frame), dtype=np.int64), np.asarray([DEFAULTS[column]])
    codes, labels = pd.factorize(frame[column], use_na_sentinel=False)
    labels = np.asarray(labels, dtype=object if column in ("action", "outcome") else None)
    if column in ("action", "outcome"):
        labels = np.asarray(["" if pd.isna(v) else str(v) for v in labels], dtype=object)
    return np.asarray(codes, dtype=np.int64), labels


def count_rows(frame: pd.DataFrame) -> pd.DataFrame:
    """n_u per key u (module docstring) for one partition of decision rows: each key column
    is factorised to integer codes, the codes combined into one int64 per row
    (``np.ravel_multi_index``) and the distinct combinations counted (``np.unique``)."""
    codes, labels = zip(*(_key_codes(frame, c) for c in KEY_COLUMNS))
    dims = tuple(max(len(u), 1) for u in labels)
    check_key_space(dims)
    combined = np.ravel_multi_index(codes, dims)
    distinct, n = np.unique(combined, return_counts=True)
    columns = np.unravel_index(distinct, dims)
    out = {c: u[idx] for c, u, idx in zip(KEY_COLUMNS, labels, columns)}
    return pd.DataFrame({**out, COUNT_COLUMN: n})


def _factorize(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(code per value, distinct values in order of appearance), as ``pd.factorize``; a
    constant column (e.g. ``start`` absent, so 0 everywhere) without hashing it."""
    if len(values) and values.min() == values.max() and not np.isnan(values[0]):
        return np.zeros(len(values), dtype=np.int64), values[:1]
    return pd.factorize(values)


def condition_codes(keys: KeyArrays, firsts: np.ndarray) -> tuple[np.ndarray, list[np.ndarray]]:
    """(condition code per trial, per design column its value per condition) for the design
    columns p_survive, gain, start and bust_keep, which are constant within each trial: the
    distinct combinations among the trials' first rows ``firsts``."""
    per_trial = [_factorize(getattr(keys, c)[firsts]) for c in KEY_COLUMNS[1:5]]
    dims = tuple(max(len(u), 1) for _, u in per_trial)
    combined = np.ravel_multi_index(tuple(np.asarray(c) for c, _ in per_trial), dims)
    condition, distinct = pd.factorize(combined)
    positions = np.unravel_index(np.asarray(distinct), dims)
    labels = [np.asarray(u)[p] for (_, u), p in zip(per_trial, positions)]
    return np.asarray(condition, dtype=np.int64), labels


def row_keys(
    keys: KeyArrays, sizes: tuple[int, ...], firsts: np.ndarray, condition: np.ndarray
) -> np.ndarray:
    """Per row its key (subject, condition, step, action, outcome) combined into one int64,
    row-major over ``sizes`` as ``np.ravel_multi_index`` would: subject and condition are
    constant within a trial (a new subject starts a new trial), so their part is formed per
    trial and repeated over each trial's rows,

        key = (((s * C + c) * S + step) * A + action) * O + outcome."""
    check_key_space(sizes)
    _, n_conditions, n_steps, n_actions, n_outcomes = sizes
    per_trial = keys.subject_codes[firsts].astype(np.int64) * n_conditions + condition
    lengths = np.diff(np.append(firsts, keys.n_rows))
    key = np.repeat(per_trial * (n_steps * n_actions * n_outcomes), lengths)
    key += keys.step.astype(np.int64, copy=False) * (n_actions * n_outcomes)
    key += keys.action.astype(np.int64) * n_outcomes
    key += keys.outcome
    return key


def count_keys(keys: KeyArrays) -> CountTable:
    """n_u per key u (module docstring) from a screened part's arrays (data_schemas/
    arrow_screen.py), without a frame of rows, as codes with the part's label tables: the
    same counts as ``count_rows`` on the part's clean rows (``table_frame`` shows them)."""
    firsts = np.flatnonzero(keys.trial_start)
    condition, design = condition_codes(keys, firsts)
    n_steps = int(keys.step.max()) + 1 if keys.n_rows else 1
    sizes = (len(keys.subject_labels), len(design[0]), n_steps, len(C.ACTIONS), len(OUTCOME_LABELS))
    sizes = tuple(max(d, 1) for d in sizes)
    combined = row_keys(keys, sizes, firsts, condition)
    subject, cond, step, action, outcome, n = sum_by_key(combined, sizes)
    return CountTable(
        subject_labels=np.asarray(keys.subject_labels),
        design=np.column_stack(design).astype(np.float64).reshape(-1, 4),
        subject=subject.astype(np.int64),
        condition=cond.astype(np.int64),
        step=step.astype(np.int64),
        action=action.astype(np.int64),
        outcome=outcome.astype(np.int64),
        n=n,
    )


def merge_once(frames: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Stack count frames and sum n_u per key, sorted by key: one pandas groupby over the
    labels (the reference that ``merge_counts`` is tested against)."""
    stacked = pd.concat(list(frames), ignore_index=True)
    merged = stacked.groupby(list(KEY_COLUMNS), sort=True, observed=True)[COUNT_COLUMN].sum()
    return merged.reset_index()


def merge_counts(parts: Iterable[CountTable | pd.DataFrame]) -> pd.DataFrame:
    """Sum the counts of several partitions (n_u adds over partitions), sorted by key, from
    their codes (estimation/ml/count_tables.py ``merge_tables``; MERGE_CHUNK tables at a
    time, so that the stacked copy stays small)."""
    return merge_tables(parts)


def counts_frame(counts: pd.DataFrame) -> pd.DataFrame:
    """One decision row per key (each its own one-row trial), for the array bundle."""
    frame = counts[list(KEY_COLUMNS)].copy()
    frame["outcome"] = frame["outcome"].replace("", None)
    frame["trial"] = np.arange(len(frame))
    return frame


def counts_bundle(counts: pd.DataFrame) -> Any:
    """The array bundle of the distinct keys, one one-row trial each (``counts_frame``)."""
    return to_stopping_data(counts_frame(counts))


def counts_problem(model: Any, counts: pd.DataFrame, bundle: Any = None) -> tuple[Any, Any, Any]:
    """(Problem weighted by n_u, layout, bundle of the distinct keys); ``bundle``, when
    given, is ``counts_bundle(counts)`` built already."""
    bundle = counts_bundle(counts) if bundle is None else bundle
    problem, layout, _ = build_problem(model, bundle)
    weights = problem.weights.copy()
    weights[: bundle.n_obs] = counts[COUNT_COLUMN].to_numpy(dtype=np.float64)
    problem = replace(problem, weights=weights, n_obs=int(counts[COUNT_COLUMN].sum()))
    return problem, layout, bundle


def row_problem(model: Any, frame: pd.DataFrame) -> Any:
    """The ordinary row-level Problem of the same data (the reference for the check)."""
    problem, _, _ = build_problem(model, to_stopping_data(frame))
    return problem


def reduction_gap(model: Any, frame: pd.DataFrame, n_points: int = 3, seed: int = 0) -> float:
    """max over parameter points z of |ll_rows(z) - ll_counts(z)| / max(1, |ll_rows(z)|), with
    z the model's start and ``n_points - 1`` points drawn around it (normal, sd 0.5, on the
    unconstrained scale)."""
    rows = row_problem(model, frame)
    counts, _, _ = counts_problem(model, count_rows(frame))
    rng = np.random.default_rng(seed)
    points = [rows.z0] + [rows.z0 + rng.normal(0.0, 0.5, rows.k) for _ in range(n_points - 1)]
    gaps = []
    for z in points:
        ll_rows = total_loglik(rows, z)
        ll_counts = total_loglik(counts, z)
        gaps.append(abs(ll_rows - ll_counts) / max(1.0, abs(ll_rows)))
    return float(max(gaps))


def total_loglik(problem: Any, z: np.ndarray) -> float:
    """sum_i w_i ll_i(z) over rows with w_i > 0, from the row log-likelihoods alone (a
    forward program, far cheaper to compile than the optimiser's value-gradient-Hessian)."""
    return float(problem.cluster_loglik(np.asarray(z, dtype=np.float64)).sum())


def fit_counts(
    model: Any,
    counts: pd.DataFrame,
    *,
    se: str | None = "auto",
    starts: Any = 3,
    seed: int = 0,
    max_iter: int = 200,
    bootstrap_reps: int = 200,
    progress: bool = False,
    bundle: Any = None,
) -> Fit:
    """Pooled maximum-likelihood fit on the counts n_u (module docstring); ``bundle`` as in
    ``counts_problem``."""
    problem, layout, bundle = counts_problem(model, counts, bundle)
    fit = run_fit(
        problem,
        model.name,
        bundle.n_subjects,
        se=se,
        starts=starts_from(problem, layout, starts, seed),
        seed=seed,
        max_iter=max_iter,
        bootstrap_reps=bootstrap_reps,
        progress=progress,
    )
    fit.extras["layout"] = layout
    fit.notes.append(
        f"fitted on counts: {len(counts)} distinct (subject, condition, step, action, outcome) "
        f"keys for {problem.n_obs} decisions (estimation/ml/counts.py)"
    )
    return fit


def check_and_count_part(
    parts: Sequence[str],
    index: int,
    kind: str | None = None,
    allow_censored: bool = False,
    max_per_kind: int = 20,
    count: bool = False,
    fast: bool = True,
) -> tuple[PartCheck, CountTable | pd.DataFrame | None]:
    """One task of an out-of-core pass: validate part ``index`` (with its seams,
    data_schemas/partitioned.py) and, if clean and ``count``, reduce it to counts n_u.
    With ``fast``, a part the Arrow screen vouches for (data_schemas/arrow_screen.py) is
    summarised and counted from its arrays; every other part goes to the full validator."""
    if fast and max_per_kind >= 1:
        screened = screen_part(parts, index, kind, allow_censored)
        if screened is not None:
            return screened.check, (count_keys(screened.keys) if count else None)
    check, clean = check_part(parts, index, kind, allow_censored, max_per_kind)
    if not count or clean is None or check.data_format != "decisions":
        return check, None
    return check, count_rows(clean)
