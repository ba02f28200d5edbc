"""Formula fits on the natural scale (issue 12 item 4): one row per covariate profile with
delta-method intervals, checked against a parametric bootstrap; formulas, scales and bounds
in the JSON, the summary and the command line."""

from __future__ import annotations

import json

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise import cli
from stopwise.api import resolve_data
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.natural_profiles import natural_profile_rows
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"
FORMULA = "precision ~ 1 + treatment"


def simulate(precisions: tuple[float, float], seed: int) -> pd.DataFrame:
    """Two groups of 10 subjects (treatment 0 and 1), 15 trials each, fixed design."""
    model = build_model(LOGIT)
    frames = []
    for group, precision in enumerate(precisions):
        design = stopping_design(10, 15, (0.6, 0.75, 0.9), 1.0, 100 + group)
        design["subject"] = f"g{group}" + design["subject"]
        frame = model.simulate(
            {"precision": precision}, design, jax.random.PRNGKey(seed * 10 + group)
        )
        frame["treatment"] = group
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


@pytest.fixture(scope="module")
def formula_fit():
    data = simulate((0.6, 1.5), 0)
    return data, stopwise.fit(LOGIT, data, formulas=[FORMULA], se="hessian")


def test_profile_table_has_natural_scale_rows(formula_fit) -> None:
    _, fit = formula_fit
    table = fit.profiles.set_index(["treatment", "parameter"])
    est = table["estimate"]
    b0, b1 = fit.z  # precision = exp(b0 + b1 * treatment) (log scale above 0)
    assert est[(0, "precision")] == pytest.approx(np.exp(b0))
    assert est[(1, "precision")] == pytest.approx(np.exp(b0 + b1))
    assert (table["ci_low"] < est).all() and (est < table["ci_high"]).all()
    assert (table["ci_low"] > 0).all()  # intervals respect the bound at 0


def price_list(groups: int = 2, subjects: int = 12) -> pd.DataFrame:
    """A gains-only list of 10 binary choices per subject (our own numbers), two groups."""
    rows = [
        {
            "subject": f"g{g}s{s}",
            "item": i + 1,
            "treatment": g,
            **{"a_x1": 20, "a_p1": p, "a_x2": 16, "a_p2": 1 - p},
            **{"b_x1": 38, "b_p1": p, "b_x2": 1, "b_p2": 1 - p},
        }
        for g in range(groups)
        for s in range(subjects)
        for i, p in enumerate(np.round(np.arange(0.1, 1.01, 0.1), 2))
    ]
    return pd.DataFrame(rows)


def simulate_choices(design: pd.DataFrame, thetas: list[dict[str, float]], seed: int):
    model = build_model("crra+logit")
    parts = [
        model.simulate(theta, design[design["treatment"] == g], jax.random.PRNGKey(seed + g))
        for g, theta in enumerate(thetas)
    ]
    return pd.concat(parts, ignore_index=True)


@pytest.mark.slow
def test_delta_method_agrees_with_a_parametric_bootstrap() -> None:
    model = build_model("crra+logit")
    formula = "r ~ 1 + treatment"
    design = price_list()
    data = simulate_choices(design, [{"r": 0.3, "precision": 0.4}, {"r": 0.6, "precision": 0.4}], 0)
    fit = stopwise.fit(model, data, formulas=[formula], se="hessian")
    table = fit.profiles.set_index(["treatment", "parameter"])
    thetas = [{p: float(table.loc[(g, p), "estimate"]) for p in ("r", "precision")} for g in (0, 1)]
    values = []
    for b in range(60):  # parametric bootstrap: simulate from the fit, refit (seeded)
        bundle, frame = resolve_data(simulate_choices(design, thetas, 1000 + 7 * b))
        refit = fit_mle(
            model,
            bundle,
            formulas=[formula],
            covariate_frame=frame,
            starts=1,
            se=None,
            progress=False,
        )
        rows = natural_profile_rows(
            refit.extras["layout"], refit.z, None, refit.extras["designs"], bundle.n_obs
        )
        values.append(rows["estimate"].to_numpy())
    boot = np.array(values)
    profile_rows = natural_profile_rows(
        fit.extras["layout"], fit.z, fit.cov_z, fit.extras["designs"], fit.n_obs
    )
    delta_se = profile_rows["se"].to_numpy()
    # Parametric bootstrap as the reference for sampling spread (Efron & Tibshirani 1993,
    # from memory); with 60 replications the bootstrap sd is within about 3 x 9% of the
    # truth, so a ratio outside (0.7, 1.4) is a real disagreement.
    ratio = boot.std(axis=0, ddof=1) / delta_se
    assert np.all((ratio > 0.7) & (ratio < 1.4)), ratio
    assert np.all(np.abs(np.median(boot, axis=0) - profile_rows["estimate"]) < 0.5 * delta_se)
    # The delta-method 95% interval against the bootstrap's 2.5% and 97.5% percentiles: a
    # percentile from 60 draws is uncertain by about 0.35 sd, so 1 se is a 3-sigma bound.
    low, high = np.percentile(boot, [2.5, 97.5], axis=0)
    assert np.all(np.abs(low - profile_rows["ci_low"]) < delta_se)
    assert np.all(np.abs(high - profile_rows["ci_high"]) < delta_se)


def test_json_records_formulas_profiles_scales_and_bounds(formula_fit) -> None:
    _, fit = formula_fit
    payload = json.loads(fit.to_json())
    assert payload["formulas"] == {"precision": "1 + treatment"}
    assert len(payload["profiles"]) == 2
    rows = {p["name"]: p for p in payload["params"]}
    assert rows["precision:treatment"]["scale"].startswith("log scale above 0")
    assert rows["precision:treatment"]["bounds"] == [0.0, None]
    assert rows["precision"]["scale"].startswith("natural, at the reference profile")
    assert "Effects on precision (named precision:column) are on the log scale above 0" in (
        fit.summary()
    )


def test_command_line_prints_the_profile_table(tmp_path, capsys) -> None:
    path = tmp_path / "groups.csv"
    simulate((0.6, 1.5), 2).to_csv(path, index=False)
    out = tmp_path / "fit.json"
    code = cli.main(["fit", str(path), "--model", LOGIT, "--formula", FORMULA, "--json", str(out)])
    assert code == 0
    assert "Each covariate profile on the natural scale" in capsys.readouterr().out
    assert len(json.loads(out.read_text())["profiles"]) == 2
