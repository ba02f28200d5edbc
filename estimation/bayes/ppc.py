"""Posterior predictive checks and shrinkage for Bayesian fits.

Stopping data. With h_s = P(draw | condition c, step s) under one posterior draw and
p = p_survive(c), a trial of condition c ends

    by a stop at step s:          reach_s (1 - h_s)
    by a bust on the draw at s:   reach_s h_s (1 - p),     reach_s = prod_{j<s} h_j p,

and reach_H is the mass beyond the data horizon H ("beyond"). The predicted share for a
condition (or a subject) averages these distributions over the trials it holds, each trial
with its subject's parameters; the posterior mean and a central interval over draws are set
against the observed shares of trials ending each way at each step.

Lottery data: the predicted probability of choosing B per item and per subject (posterior
mean, central interval) against the observed share.

Shrinkage: per-subject ML estimates beside the hierarchical posterior means, with
shrinkage = 1 - (posterior mean - population median) / (ML - population median), the share
of the distance to the population the hierarchy removed (Gelman et al. 2013, BDA3, ch. 5).
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.labels import population_median
from stopwise.estimation.bayes.posterior import response_probability


def subject_theta_draws(posterior: Any, n_draws: int) -> dict[str, np.ndarray]:
    """Natural-scale parameters of each subject's first cell: name -> (n_draws, n_subjects)."""
    theta = posterior.cell_theta_draws(n_draws)
    _, first_row = np.unique(np.asarray(posterior.data.subject), return_index=True)
    cell = np.asarray(posterior.args.row_cell)[first_row]
    return {k: v[:, cell] for k, v in theta.items()}


def end_distribution(
    h: np.ndarray, p_survive: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """P(stop at s), P(bust at s) and P(beyond the horizon) from h (..., n_cond, H) (module
    docstring), computed with cumulative log sums."""
    p = p_survive[:, None]
    log_step = np.log(np.clip(h * p, 1e-300, None))
    cum = np.cumsum(log_step, axis=-1)
    log_reach = np.concatenate([np.zeros_like(cum[..., :1]), cum[..., :-1]], axis=-1)
    reach = np.exp(log_reach)
    return reach * (1.0 - h), reach * h * (1.0 - p), np.exp(cum[..., -1])


def observed_trial_ends(data: StoppingData) -> pd.DataFrame:
    """One row per trial: subject index, condition, the last step and how it ended."""
    frame = pd.DataFrame(
        {
            "trial": np.asarray(data.trial),
            "subject": np.asarray(data.subject),
            "cond": np.asarray(data.cond),
            "step": np.asarray(data.step),
            "draw": np.asarray(data.draw),
            "bust": np.asarray(data.bust),
        }
    )
    last = frame.sort_values(["trial", "step"]).groupby("trial").tail(1)
    end = np.where(last["draw"] == 0, "stop", np.where(last["bust"] == 1, "bust", "censored"))
    return last.assign(end=end)[["trial", "subject", "cond", "step", "end"]]


def stop_step_frame(posterior: Any, n_draws: int = 200, interval: float = 0.9) -> pd.DataFrame:
    """Predicted vs observed trial-end distributions per condition and per subject (tidy:
    level, cond, p_survive, gain, subject, end, step, n_trials, observed, predicted,
    pred_low, pred_high)."""
    data = posterior.data
    if not isinstance(data, StoppingData):
        raise StopwiseInputError(
            "stop-step checks need stopping data; use choice_frame for lottery data"
        )
    theta = subject_theta_draws(posterior, n_draws)
    grid = jax.tree_util.tree_map(jnp.asarray, data.condition_grid())
    model = posterior.model
    h = np.asarray(
        jax.jit(jax.vmap(jax.vmap(lambda t: response_probability(model, t, grid))))(
            {k: jnp.asarray(v) for k, v in theta.items()}
        )
    )
    horizon = grid.horizon
    h = h.reshape(*h.shape[:2], data.n_cond, horizon)  # draws, subjects, cond, step
    p_surv = np.asarray(data.cond_p_survive)
    stop, bust, beyond = end_distribution(h, p_surv)
    ends = observed_trial_ends(data)
    ends = ends[ends["end"] != "censored"]
    counts = np.zeros((posterior.n_subjects, data.n_cond))
    np.add.at(counts, (ends["subject"].to_numpy(), ends["cond"].to_numpy()), 1.0)
    labels = (
        np.asarray(data.subject_labels)
        if data.subject_labels is not None
        else np.arange(posterior.n_subjects)
    )
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    frames = []
    # per condition: weights over subjects; per subject: weights over conditions
    for level in ("condition", "subject"):
        axis_groups = range(data.n_cond) if level == "condition" else range(posterior.n_subjects)
        for g in axis_groups:
            w = counts[:, g] if level == "condition" else counts[g, :]
            if w.sum() == 0:
                continue
            if level == "condition":
                pick = lambda a, g=g, w=w: np.einsum("s,dsk->dk", w / w.sum(), a[:, :, g])  # noqa: E731
                mine = ends[ends["cond"] == g]
            else:
                pick = lambda a, g=g, w=w: np.einsum("c,dck->dk", w / w.sum(), a[:, g])  # noqa: E731
                mine = ends[ends["subject"] == g]
            n_trials = len(mine)
            for end, array in (("stop", stop), ("bust", bust)):
                pred = pick(array)  # draws, steps
                obs = np.bincount(mine.loc[mine["end"] == end, "step"], minlength=horizon)
                frames.append(
                    pd.DataFrame(
                        {
                            "level": level,
                            "cond": g if level == "condition" else -1,
                            "p_survive": p_surv[g] if level == "condition" else np.nan,
                            "gain": np.asarray(data.cond_gain)[g]
                            if level == "condition"
                            else np.nan,
                            "subject": labels[g] if level == "subject" else None,
                            "end": end,
                            "step": np.arange(horizon),
                            "n_trials": n_trials,
                            "observed": obs[:horizon] / n_trials,
                            "predicted": pred.mean(axis=0),
                            "pred_low": np.quantile(pred, lo_q, axis=0),
                            "pred_high": np.quantile(pred, hi_q, axis=0),
                        }
                    )
                )
            over = beyond[:, :, g] if level == "condition" else beyond[:, g]
            over = over @ (w / w.sum())
            frames.append(
                pd.DataFrame(
                    {
                        "level": [level],
                        "cond": [g if level == "condition" else -1],
                        "p_survive": [p_surv[g] if level == "condition" else np.nan],
                        "gain": [np.asarray(data.cond_gain)[g] if level == "condition" else np.nan],
                        "subject": [labels[g] if level == "subject" else None],
                        "end": ["beyond"],
                        "step": [horizon],
                        "n_trials": [n_trials],
                        "observed": [0.0],
                        "predicted": [float(np.mean(over))],
                        "pred_low": [float(np.quantile(over, lo_q))],
                        "pred_high": [float(np.quantile(over, hi_q))],
                    }
                )
            )
    return pd.concat(frames, ignore_index=True)


def choice_frame(posterior: Any, n_draws: int = 200, interval: float = 0.9) -> pd.DataFrame:
    """Lottery data: predicted vs observed share choosing B per item and per subject."""
    data = posterior.data
    if not isinstance(data, LotteryData):
        raise StopwiseInputError("choice checks need lottery data; use stop_step_frame")
    prob = row_probability_draws(posterior, n_draws)  # draws, rows
    items = (
        np.asarray(data.item_labels)
        if data.item_labels is not None
        else np.unique(
            np.hstack(
                [
                    np.asarray(data.a_x),
                    np.asarray(data.a_p),
                    np.asarray(data.b_x),
                    np.asarray(data.b_p),
                ]
            ),
            axis=0,
            return_inverse=True,
        )[1].reshape(-1)
    )
    subjects = np.asarray(data.subject)
    labels = (
        np.asarray(data.subject_labels)
        if data.subject_labels is not None
        else np.arange(posterior.n_subjects)
    )
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    chose = np.asarray(data.choice_b)
    rows = []
    for level, keys in (("item", items), ("subject", subjects)):
        for key in np.unique(keys):
            sel = keys == key
            pred = prob[:, sel].mean(axis=1)
            rows.append(
                {
                    "level": level,
                    "group": labels[key] if level == "subject" else key,
                    "n": int(sel.sum()),
                    "observed": float(chose[sel].mean()),
                    "predicted": float(pred.mean()),
                    "pred_low": float(np.quantile(pred, lo_q)),
                    "pred_high": float(np.quantile(pred, hi_q)),
                }
            )
    return pd.DataFrame(rows)


def row_probability_draws(posterior: Any, n_draws: int) -> np.ndarray:
    """P(modelled response) per data row for each of ``n_draws`` draws: (n_draws, n_obs)."""
    theta = posterior.cell_theta_draws(n_draws)
    args = posterior.args
    model = posterior.model
    prob = np.asarray(
        jax.jit(
            jax.vmap(
                lambda t: jax.vmap(lambda tc, dc: response_probability(model, tc, dc))(t, args.data)
            )
        )({k: jnp.asarray(v) for k, v in theta.items()})
    )
    return prob[:, np.asarray(args.row_cell), np.asarray(args.row_pos)]


def ppc_figure(frame: pd.DataFrame, level: str = "condition", max_panels: int = 12) -> Any:
    """A matplotlib figure (Agg backend): one panel per condition (or subject), observed
    shares of trials ending by a stop (bars) or bust (hatched bars) at each step, predicted
    posterior means with central intervals (points and lines)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    part = frame[(frame["level"] == level) & (frame["end"] != "beyond")]
    key = "cond" if level == "condition" else "subject"
    groups = list(dict.fromkeys(part[key]))[:max_panels]
    if not groups:
        raise StopwiseInputError(f"no {level} rows to plot")
    cols = min(3, len(groups))
    rows = int(np.ceil(len(groups) / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 3.0 * rows), squeeze=False)
    for ax, g in zip(axes.ravel(), groups):
        sub = part[part[key] == g]
        last = int(sub.loc[(sub["observed"] > 0) | (sub["predicted"] > 1e-3), "step"].max()) + 2
        for end, offset, hatch in (("stop", -0.2, None), ("bust", 0.2, "//")):
            s = sub[(sub["end"] == end) & (sub["step"] <= last)]
            ax.bar(
                s["step"] + offset,
                s["observed"],
                width=0.4,
                alpha=0.5,
                hatch=hatch,
                label=f"observed {end}",
            )
            ax.errorbar(
                s["step"] + offset,
                s["predicted"],
                yerr=[s["predicted"] - s["pred_low"], s["pred_high"] - s["predicted"]],
                fmt="o",
                ms=2.5,
                lw=0.8,
                label=f"predicted {end}",
            )
        if level == "condition":
            title = f"p_survive {sub['p_survive'].iloc[0]:g}, gain {sub['gain'].iloc[0]:g}"
        else:
            title = f"subject {g}"
        ax.set_title(f"{title} (n={int(sub['n_trials'].iloc[0])})", fontsize=9)
        ax.set_xlabel("step at which the trial ended")
        ax.set_ylabel("share of trials")
    for ax in axes.ravel()[len(groups) :]:
        ax.set_visible(False)
    axes[0, 0].legend(fontsize=7)
    fig.tight_layout()
    return fig


def shrinkage_table(posterior: Any, ml: Any) -> pd.DataFrame:
    """Per subject and parameter: ML estimate and SE (``ml``: per-subject ML fits of the same
    model and data, e.g. ``stopwise.fit(model, data, by="subject", se="hessian")``; the Bayes
    wing does not fit them itself), hierarchical posterior mean and sd, the population median
    and the shrinkage (module docstring)."""
    if not posterior.hierarchical or posterior.subject_params is None:
        raise StopwiseInputError(
            "a shrinkage table needs a hierarchical fit (fit_bayes(..., hierarchical=True))"
        )
    ml_frame = ml.params.reset_index() if "subject" not in ml.params.columns else ml.params
    ml_frame = ml_frame.rename(columns={"name": "param", "estimate": "ml_estimate", "se": "ml_se"})[
        ["subject", "param", "ml_estimate", "ml_se"]
    ]
    post = posterior.subject_params.rename(
        columns={"estimate": "posterior_mean", "se": "posterior_sd"}
    )
    post = post[["subject", "param", "posterior_mean", "posterior_sd"]]
    ml_frame = ml_frame.assign(subject=ml_frame["subject"].astype(str))
    post = post.assign(subject=post["subject"].astype(str))
    table = post.merge(ml_frame, on=["subject", "param"], how="left")
    centre = {
        name: float(posterior.params.loc[population_median(name), "estimate"])
        for name in posterior.model.param_names
        if population_median(name) in posterior.params.index
    }
    table["population_median"] = table["param"].map(centre)
    distance = table["ml_estimate"] - table["population_median"]
    with np.errstate(divide="ignore", invalid="ignore"):
        table["shrinkage"] = np.where(
            np.abs(distance) > 1e-12,
            1.0 - (table["posterior_mean"] - table["population_median"]) / distance,
            np.nan,
        )
    return table
