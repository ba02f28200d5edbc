"""The figure sections of a report: stopping behaviour against the fitted models, per-subject
estimates and shrinkage, contest play and Bayesian diagnostics. A figure that cannot be
drawn adds a line to the report's warnings saying why."""

from __future__ import annotations

from typing import Any

import pandas as pd

from stopwise.bayes_draws import KEY as THINNED_KEY
from stopwise.bayes_draws import saved_draws
from stopwise.contest import counterfactual
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.figures.bayes import idata_from_draws, posterior_figure
from stopwise.figures.contest import (
    CONTEST_CONDITION,
    contest_conditions,
    observed_contest_stops,
    schemes_figure,
    target_distribution_figure,
)
from stopwise.figures.lottery import lottery_choice_figure, lottery_items
from stopwise.figures.stopping import solo_rows, stop_distribution_figure, stopping_curves_figure
from stopwise.figures.subjects import shrinkage_figure, subject_estimates_figure
from stopwise.figures.sweep import sweep_figure
from stopwise.report.blocks import Block, Inputs, Section, figure_block
from stopwise.saved import SavedCollection, SavedFit, SavedSweep
from stopwise.saved_predict import PROFILE_KEYS

MAX_CONTEST_SCHEMES = 4
MAX_PROFILES = 4
MAX_SWEEP_LINES = 4
SCHEME_COLUMNS = (
    "scheme",
    "prediction",
    "mean_target",
    "bust_rate",
    "expected_bank",
    "efficiency_loss",
    "win_prob",
    "prize_outlay",
)


def model_kind(fit: SavedFit) -> str:
    """ "stopping", "contest" or "lottery", from the rebuilt model."""
    return fit.build_model().data_kind


def solo_predictions(inputs: Inputs, fits: list[SavedFit], warnings: list[str]) -> dict:
    """label -> stop_steps frame of every solo stopping fit that predicts these data."""
    out = {}
    for fit in fits:
        if model_kind(fit) != "stopping":
            continue
        try:
            table = fit.predict(inputs.data)["stop_steps"]
        except StopwiseInputError as exc:
            warnings.append(f"no stopping-curve prediction from {fit.model}: {exc}")
            continue
        if "profile" not in table:
            out[fit.model] = table
            continue
        profiles = sorted(table["profile"].unique())
        if len(profiles) > MAX_PROFILES:
            warnings.append(
                f"{fit.model}: {len(profiles)} covariate profiles; the stopping curves show "
                f"the first {MAX_PROFILES}"
            )
        for c in profiles[:MAX_PROFILES]:
            label = f"{fit.model} ({profile_label(fit.record, int(c))})"
            out[label] = table[table["profile"] == c].drop(columns="profile")
    return out


def profile_label(record: dict, profile: int) -> str:
    """A formula fit's covariate profile as text, e.g. "treatment = 1"."""
    for row in record.get("profiles") or []:
        if int(row["profile"]) == profile:
            names = [k for k in row if k not in PROFILE_KEYS]
            return ", ".join(f"{k} = {row[k]}" for k in names) or f"profile {profile}"
    return f"profile {profile}"


def stopping_section(inputs: Inputs, fits: list[SavedFit], warnings: list[str]) -> Section | None:
    if inputs.data is None or inputs.data.kind != "stopping":
        return None
    if solo_rows(inputs.data.frame).empty:
        return None
    frame = inputs.data.frame
    predictions = solo_predictions(inputs, fits, warnings)
    return Section(
        "Stopping behaviour",
        [
            figure_block(
                stopping_curves_figure(frame, predictions),
                "stopping_curves",
                "P(draw again | step) per condition: observed share with its exact binomial "
                "95% interval (steps with at least 5 decisions), each fitted model, and the "
                "risk-neutral rule (draw while the bank is below p*gain/(1-p)).",
            ),
            figure_block(
                stop_distribution_figure(frame, predictions),
                "stop_steps",
                "Share of trials ended by stopping at each step (the banked amount is "
                "start + step x gain), observed and predicted; the legends give bust rates.",
            ),
        ],
    )


def hierarchical_subjects(saved: SavedFit) -> pd.DataFrame:
    """A hierarchical fit's per-subject posterior rows as (subject, name, estimate, se)."""
    rows = pd.DataFrame(saved.record.get("subjects") or [])
    if rows.empty:
        return rows
    return rows.rename(columns={"param": "name"})[["subject", "name", "estimate", "se"]]


def shrinkage_frame(ml: pd.DataFrame, hier: pd.DataFrame, population: pd.DataFrame) -> pd.DataFrame:
    """Per subject and parameter: ML estimate, posterior mean and the population centre."""
    merged = hier.rename(columns={"estimate": "posterior_mean"}).merge(
        ml.rename(columns={"estimate": "ml_estimate"})[["subject", "name", "ml_estimate"]],
        on=["subject", "name"],
        how="inner",
    )
    merged = merged[merged["name"].isin(population.index)]
    merged["population_median"] = merged["name"].map(population["estimate"])
    return merged.rename(columns={"name": "param"})


def subjects_section(inputs: Inputs) -> Section | None:
    blocks = []
    by_subject = {
        s.fits[0].model: s.table.assign(subject=lambda f: f["subject"].astype(str))
        for _, s, _ in inputs.results
        if isinstance(s, SavedCollection) and s.kind == "by_subject" and s.fits
    }
    for model, table in by_subject.items():
        blocks.append(
            figure_block(
                subject_estimates_figure(table),
                f"subjects_{len(blocks)}",
                f"{model}, per-subject maximum likelihood: spread of the estimates (top) and "
                "each estimate against its standard error (bottom).",
            )
        )
    for _, saved, _ in inputs.results:
        if not isinstance(saved, SavedFit) or not saved.record.get("hierarchical"):
            continue
        hier = hierarchical_subjects(saved).assign(subject=lambda f: f["subject"].astype(str))
        if saved.model in by_subject and not hier.empty:
            table = shrinkage_frame(by_subject[saved.model], hier, saved.params)
            blocks.append(
                figure_block(
                    shrinkage_figure(table),
                    f"shrinkage_{len(blocks)}",
                    f"{saved.model}: each subject's ML estimate (arrow tail) and hierarchical "
                    "posterior mean (arrow head); the dashed line is the population median.",
                )
            )
        elif not hier.empty:
            blocks.append(
                figure_block(
                    subject_estimates_figure(hier),
                    f"subjects_{len(blocks)}",
                    f"{saved.model}, hierarchical: posterior means of the subjects and their "
                    "posterior standard deviations.",
                )
            )
    return Section("Subjects", blocks) if blocks else None


def contest_schemes(trials: pd.DataFrame) -> list[dict[str, Any]]:
    """The data's contest conditions as counterfactual schemes (most frequent first)."""
    counts = trials.groupby(CONTEST_CONDITION).size().sort_values(ascending=False)
    schemes = []
    for p, players, prize, keep in counts.index[:MAX_CONTEST_SCHEMES]:
        name = f"p {p:g}, {int(players)} players, prize {prize:g}{', keep bank' if keep else ''}"
        schemes.append(
            {
                "name": name,
                "p_survive": p,
                "players": int(players),
                "prize": prize,
                "keep_bank": bool(keep),
            }
        )
    return schemes


def contest_section(inputs: Inputs, fits: list[SavedFit], warnings: list[str]) -> Section | None:
    if inputs.data is None or inputs.data.kind != "stopping":
        return None
    trials = contest_conditions(inputs.data.frame)
    contest_fits = [f for f in fits if model_kind(f) == "contest"]
    if trials.empty or not contest_fits:
        return None
    schemes = contest_schemes(trials)
    observed = {}
    for s in schemes:
        here = trials[
            (trials["p_survive"] == s["p_survive"])
            & (trials["n_players"] == s["players"])
            & (trials["prize"] == s["prize"])
            & (trials["keep_bank"] == s["keep_bank"])
        ]
        observed[s["name"]] = observed_contest_stops(here)
    blocks = []
    for fit in contest_fits:
        try:
            result = counterfactual(fit.contest_input(), schemes)
        except StopwiseInputError as exc:
            warnings.append(f"no contest figure for {fit.model}: {exc}")
            continue
        blocks += [
            figure_block(
                target_distribution_figure(result.plot_frame, observed),
                f"contest_targets_{len(blocks)}",
                f"{fit.model} at its estimates and Nash play: P(target) in each contest "
                "condition of the data; bars: stop steps of the trials that ended by a stop "
                "(a bust hides the target).",
            ),
            figure_block(
                schemes_figure(result.table),
                f"contest_schemes_{len(blocks)}",
                "Expected bank, bust rate and efficiency loss per condition and prediction.",
            ),
            Block("table", table=result.table[[c for c in SCHEME_COLUMNS if c in result.table]]),
        ]
    return Section("Contests", blocks) if blocks else None


def bayes_section(inputs: Inputs, warnings: list[str]) -> Section | None:
    """Rank plots and densities of every Bayesian fit, from the thinned draws its record
    keeps (stopwise/bayes_draws.py), so a saved JSON draws the same figure as a live fit."""
    blocks = []
    for label, saved, _ in inputs.results:
        if not isinstance(saved, SavedFit) or saved.method != "bayes":
            continue
        draws = saved_draws(saved.record)
        if not draws:
            warnings.append(
                f"{label}: no posterior draws saved with this Bayesian fit (written by an "
                "older stopwise); rank plots and densities are not drawn"
            )
            continue
        kept = saved.record[THINNED_KEY]
        blocks.append(
            figure_block(
                posterior_figure(idata_from_draws(draws), list(draws)),
                f"bayes_{len(blocks)}",
                f"{saved.model}: rank plots of the chains (near uniform when they agree) and "
                "posterior densities with 95% HDI, from the draws saved with the fit: "
                f"{next(iter(draws.values())).shape[1]} of {kept['draws_per_chain']} per "
                f"chain (thinning step {kept['step']}), {kept['chains']} chains.",
            )
        )
    return Section("Bayesian diagnostics", blocks) if blocks else None


def lottery_predictions(inputs: Inputs, fits: list[SavedFit], warnings: list[str]) -> dict:
    """label -> per-item frame (lottery_items with "predicted") of every lottery fit that
    predicts these data row by row."""
    frame = inputs.data.frame
    out = {}
    for fit in fits:
        if model_kind(fit) != "lottery":
            continue
        try:
            p_choose_b = fit.predict(inputs.data)["rows"]["p_choose_b"].to_numpy()
        except StopwiseInputError as exc:
            warnings.append(f"no lottery-choice prediction from {fit.model}: {exc}")
            continue
        if len(p_choose_b) != len(frame):
            warnings.append(f"{fit.model}: predictions do not align with the data rows; not drawn")
            continue
        out[fit.model] = lottery_items(frame, p_choose_b)
    return out


def lottery_section(inputs: Inputs, fits: list[SavedFit], warnings: list[str]) -> Section | None:
    if inputs.data is None or inputs.data.kind != "lottery":
        return None
    predictions = lottery_predictions(inputs, fits, warnings)
    return Section(
        "Lottery choices",
        [
            figure_block(
                lottery_choice_figure(lottery_items(inputs.data.frame), predictions),
                "lottery_choices",
                "Share of choices of the riskier option (larger outcome spread) per item "
                "against its expected-value advantage: observed with exact binomial 95% "
                "intervals, and each fitted model's mean predicted probability.",
            )
        ],
    )


def sweep_caption(line: pd.DataFrame, axis: str) -> str:
    """What a sweep figure shows and how far its points are certified."""
    certified = line["certified"].astype(bool)
    regret = pd.to_numeric(line["max_regret"], errors="coerce")
    worst = float(regret.max()) if regret.notna().any() else float("nan")
    status = (
        f"all {len(line)} points certified (largest max regret {worst:.2g})"
        if certified.all()
        else f"{int((~certified).sum())} of {len(line)} points NOT certified (crosses)"
    )
    return (
        f"{line['concept'].iloc[0]} play along {axis.replace('_', ' ')}: probability of each "
        "target (top) and the total-variation jump to the previous point (bottom); " + status
    )


def sweep_section(inputs: Inputs, warnings: list[str]) -> Section | None:
    """One figure per line of every saved sweep (at most MAX_SWEEP_LINES each)."""
    blocks = []
    for label, saved, _ in inputs.results:
        if not isinstance(saved, SavedSweep):
            continue
        lines = saved.lines()
        if len(lines) > MAX_SWEEP_LINES:
            warnings.append(
                f"{label}: {len(lines)} lines in the sweep's grid; the report draws the first "
                f"{MAX_SWEEP_LINES}"
            )
        for line in lines[:MAX_SWEEP_LINES]:
            message = f"{label}: the sweep holds points that are not certified"
            if not line["certified"].astype(bool).all() and message not in warnings:
                warnings.append(message)
            blocks.append(
                Block(
                    "figure",
                    text=f"From {label}: " + sweep_caption(line, saved.axis),
                    png=sweep_figure(line, saved.axis),
                    stem=f"sweep_{len(blocks)}",
                )
            )
    return Section("Sweeps", blocks) if blocks else None


def figure_sections(inputs: Inputs, fits: list[SavedFit], warnings: list[str]) -> list[Section]:
    sections = [
        stopping_section(inputs, fits, warnings),
        lottery_section(inputs, fits, warnings),
        subjects_section(inputs),
        contest_section(inputs, fits, warnings),
        sweep_section(inputs, warnings),
        bayes_section(inputs, warnings),
    ]
    return [s for s in sections if s is not None]
