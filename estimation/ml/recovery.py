"""Parameter recovery: simulate from known truths on a design, refit, summarise.

For each parameter over R replications with estimates t_r, standard errors s_r and 95%
intervals [l_r, h_r]:  bias = mean(t_r) - truth;  RMSE = sqrt(mean((t_r - truth)^2));
coverage = share of r with l_r <= truth <= h_r;  plus the correlation matrix of the
estimates across replications. A parameter is flagged as poorly identified by this design
when (a) more than 10% of replications put it at a bound or give NaN standard errors,
(b) its RMSE exceeds its range of plausible values (|truth| + 1), or (c) its estimates
correlate above 0.95 in absolute value with another parameter's (a ridge in the likelihood).
With ``rivals``, every replication is also fitted by each rival model and the share of
replications in which the generating model has the smallest AIC is reported.

Replication r simulates with the JAX key fold_in(PRNGKey(seed), r) and refits with seed
seed + r, so each replication depends only on (seed, r): run in-process or on Dask workers
(estimation/distributed.py) the results are identical. Replications that fail twice are
listed in ``Recovery.run`` and the summary; they are never dropped silently.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import jax
import numpy as np
import pandas as pd

from stopwise.estimation.distributed import StudyRun, run_tasks
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.results import DISCLAIMER


def stopping_design(
    subjects: int, trials: int, p_survive: Sequence[float], gain: float, seed: int = 0
) -> pd.DataFrame:
    """One row per trial: each subject plays ``trials`` trials cycling through the survival
    probabilities in a shuffled order."""
    rng = np.random.default_rng(seed)
    rows = []
    ps = np.asarray(p_survive, dtype=float)
    for s in range(subjects):
        order = np.resize(ps, trials)
        rng.shuffle(order)
        for t in range(trials):
            rows.append((f"s{s + 1:03d}", t + 1, float(order[t]), float(gain)))
    return pd.DataFrame(rows, columns=["subject", "trial", "p_survive", "gain"])


@dataclass
class Recovery:
    """Recovery results: per-parameter summary, per-replication estimates, correlations."""

    model: str
    table: pd.DataFrame
    estimates: pd.DataFrame
    correlation: pd.DataFrame
    selection: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    run: StudyRun | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "replications": _run_dict(self.run),
            "params": self.table.reset_index().to_dict(orient="records"),
            "correlation": self.correlation.to_dict(),
            "selection": self.selection,
            "notes": list(self.notes),
        }

    def summary(self) -> str:
        lines = [
            f"Parameter recovery for {self.model}",
            self.table.to_string(float_format=lambda v: f"{v:.4g}"),
            "",
            "Correlation of estimates across replications",
            self.correlation.to_string(float_format=lambda v: f"{v:.3f}"),
        ]
        if self.selection:
            lines.append(
                f"AIC picks the generating model in {self.selection['rate']:.1%} of "
                f"{self.selection['replications']} replications "
                f"(rivals: {', '.join(self.selection['rivals'])})"
            )
        if self.run is not None:
            lines.append("Replications: " + self.run.summary_line("replications"))
        lines += [f"Note: {n}" for n in self.notes]
        lines.append(DISCLAIMER)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def _truth_for(
    truths: Mapping[str, float] | Sequence[Mapping[str, float]], rep: int
) -> dict[str, float]:
    if isinstance(truths, Mapping):
        return dict(truths)
    return dict(truths[rep % len(truths)])


@dataclass(frozen=True)
class RecoveryPayload:
    """What every replication shares: the model, the design and how to refit."""

    model: Any
    design: pd.DataFrame
    to_bundle: Callable[..., Any]
    se: str | None
    starts: int
    rivals: tuple[Any, ...]
    rival_starts: int
    share_key: bytes | None = None  # equal keys: equal contents (``kept_payload``)


HORIZON_BUCKET = 8
KEPT_PAYLOADS = 8
_KEPT: OrderedDict[bytes, RecoveryPayload] = OrderedDict()


def kept_payload(payload: RecoveryPayload) -> RecoveryPayload:
    """The first payload this process saw with ``payload.share_key`` (the last KEPT_PAYLOADS
    keys are kept), else ``payload`` itself. A cluster worker unpickles a new model for every
    study, and compiled programs are keyed by the model object, so without this each study
    of the same model and design compiled its programs again on every worker."""
    key = payload.share_key
    if key is None:
        return payload
    kept = _KEPT.setdefault(key, payload)
    _KEPT.move_to_end(key)
    while len(_KEPT) > KEPT_PAYLOADS:
        _KEPT.popitem(last=False)
    return kept


def replication_horizon(max_step: int) -> int:
    """max_step + 5 rounded up to a multiple of HORIZON_BUCKET: the horizon is a static size
    of the traced likelihood, so replications whose longest trial differs by a few steps
    share their compiled (and stored) programs instead of compiling one each."""
    return HORIZON_BUCKET * -(-(max_step + 5) // HORIZON_BUCKET)


def replication_bundle(model: Any, frame: pd.DataFrame, to_bundle: Callable[..., Any]) -> Any:
    """The arrays a replication fits: the horizon bucketed (``replication_horizon``) only for
    a model that declares its likelihood unchanged by a longer horizon (option
    ``horizon_invariant``, models/spec.py); any other model (target rules, contest models,
    a planner with max_target) gets the data's own horizon, as ``stopwise.fit`` would."""
    if "step" in frame and (model.options or {}).get("horizon_invariant"):
        return to_bundle(frame, replication_horizon(int(frame["step"].max())))
    return to_bundle(frame)


def run_replication(
    rep: int, seed: int, truth: Mapping[str, float], payload: RecoveryPayload
) -> tuple[list[dict[str, Any]], bool | None]:
    """One replication: simulate with key fold_in(PRNGKey(seed), rep), refit with seed
    seed + rep (and each rival); returns its estimate records and whether AIC picked the
    generating model (None without rivals)."""
    payload = kept_payload(payload)
    model = payload.model
    key = jax.random.fold_in(jax.random.PRNGKey(seed), rep)
    frame = model.simulate(dict(truth), payload.design, key)
    data = replication_bundle(model, frame, payload.to_bundle)
    fit = fit_mle(
        model, data, se=payload.se, starts=payload.starts, seed=seed + rep, progress=False
    )
    records = [
        {
            "rep": rep,
            "name": name,
            "truth": truth.get(name, np.nan),
            "estimate": est,
            "se": s,
            "ci_low": lo,
            "ci_high": hi,
            "converged": fit.converged,
            "at_bound": name in fit.at_bound,
        }
        for name, est, s, lo, hi in zip(
            fit.table.names, fit.table.estimate, fit.table.se, fit.table.ci_low, fit.table.ci_high
        )
    ]
    if not payload.rivals:
        return records, None
    aics = [fit.aic] + [
        fit_mle(r, data, se=None, starts=payload.rival_starts, seed=seed + rep, progress=False).aic
        for r in payload.rivals
    ]
    return records, int(np.argmin(aics)) == 0


def recover(
    model: Any,
    truths: Mapping[str, float] | Sequence[Mapping[str, float]],
    design: pd.DataFrame,
    to_bundle: Callable[..., Any],
    *,
    n_reps: int = 50,
    seed: int = 0,
    se: str | None = "auto",
    starts: int = 1,
    rivals: Sequence[Any] = (),
    rival_starts: int = 2,
    progress: bool = True,
    workers: int | None = 0,
    scheduler: str | None = None,
    timeout_s: float | None = None,
    share_key: bytes | None = None,
) -> Recovery:
    """Simulate ``n_reps`` data sets with model.simulate(truth, design, key), convert each with
    ``to_bundle(frame, horizon)``, refit and summarise (module docstring). ``workers`` and
    ``scheduler`` choose where the replications run (estimation/distributed.py); ``timeout_s``
    bounds the wait for a cluster's results. ``share_key``: a key that names the model, the
    rivals and the design completely (stopwise.recover gives one for spec strings), so that
    later studies with the same key and refit settings reuse this one's models and their
    compiled programs, also on cluster workers (``kept_payload``)."""
    for name in model.param_names:
        if isinstance(truths, Mapping) and name not in truths:
            raise ValueError(f"truths lack parameter {name!r} of {model.name}")
    if share_key is not None:
        share_key += repr((se, starts, rival_starts)).encode()
    payload = RecoveryPayload(
        model, design, to_bundle, se, starts, tuple(rivals), rival_starts, share_key
    )
    inputs = [{"rep": rep, "seed": seed, "truth": _truth_for(truths, rep)} for rep in range(n_reps)]
    run = run_tasks(
        run_replication,
        inputs,
        workers=workers,
        scheduler=scheduler,
        progress=progress,
        desc="recovery",
        timeout_s=timeout_s,
        shared={"payload": payload},
    )
    done = [r for r in run.results if r is not None]
    if not done:
        raise RuntimeError("every replication failed: " + run.summary_line("replications"))
    estimates = pd.DataFrame([rec for records, _ in done for rec in records])
    picks = [pick for _, pick in done if pick is not None]
    table = summarise(estimates)
    wide = estimates.pivot(index="rep", columns="name", values="estimate")
    corr = wide.corr() if len(wide) > 2 else pd.DataFrame()
    notes = _identification_notes(table, corr)
    if not run.complete:
        notes.append(f"only {run.n_done} of {run.n_tasks} replications ran; the table covers those")
    table["flag"] = [
        ", ".join(n for n in _flags_for(name, table.loc[name], corr)) or "" for name in table.index
    ]
    selection = {}
    if rivals:
        selection = {
            "rate": float(np.mean(picks)),
            "replications": len(picks),
            "rivals": [r.name for r in rivals],
        }
    return Recovery(model.name, table, estimates, corr, selection, notes, run)


def _run_dict(run: StudyRun | None) -> dict[str, Any] | None:
    """The JSON record of where and how completely the replications ran."""
    if run is None:
        return None
    return {
        "requested": run.n_tasks,
        "ran": run.n_done,
        "where": run.where,
        "failed": [{"rep": f.index, "error": f.error} for f in run.failures],
    }


def summarise(estimates: pd.DataFrame) -> pd.DataFrame:
    """Per-parameter bias, RMSE, coverage, mean SE, SD of estimates (module docstring)."""
    rows = {}
    for name, g in estimates.groupby("name", sort=False):
        truth = float(g["truth"].iloc[0])
        err = g["estimate"] - truth
        covered = (g["ci_low"] <= truth) & (truth <= g["ci_high"])
        rows[name] = {
            "truth": truth,
            "mean": g["estimate"].mean(),
            "bias": err.mean(),
            "rmse": float(np.sqrt((err**2).mean())),
            "sd": g["estimate"].std(ddof=1),
            "mean_se": g["se"].mean(),
            "coverage_95": covered.mean(),
            "nan_se_share": g["se"].isna().mean(),
            "at_bound_share": g["at_bound"].mean(),
            "converged_share": g["converged"].mean(),
            "replications": len(g),
        }
    return pd.DataFrame.from_dict(rows, orient="index").rename_axis("name")


def _flags_for(name: str, row: pd.Series, corr: pd.DataFrame) -> list[str]:
    flags = []
    if row["at_bound_share"] > 0.10 or row["nan_se_share"] > 0.10:
        flags.append("often at a bound or without standard errors")
    if row["rmse"] > abs(row["truth"]) + 1.0:
        flags.append("RMSE larger than the parameter's scale")
    if name in corr.index:
        others = corr.loc[name].drop(name, errors="ignore").abs()
        ridge = [o for o, v in others.items() if v > 0.95]
        if ridge:
            flags.append(f"estimates move together with {', '.join(ridge)}")
    return flags


def _identification_notes(table: pd.DataFrame, corr: pd.DataFrame) -> list[str]:
    flagged = [n for n in table.index if _flags_for(n, table.loc[n], corr)]
    if not flagged:
        return ["every parameter is recovered without an identification flag on this design"]
    return [f"poorly identified by this design: {', '.join(flagged)} (see the flag column)"]
