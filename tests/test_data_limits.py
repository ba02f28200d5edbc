"""Issue 22, items 6, 8 and 10: the outcome domain checked on the data before a fit,
non-finite simulation parameters refused by name, and documented size limits enforced up
front (exit code 2, the limit named, nothing allocated or written)."""

from __future__ import annotations

import json
import math

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.cli import main
from stopwise.commands.simulate import stopping_design
from stopwise.data_schemas import limits
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.demo import demo_data
from stopwise.models.spec import build_model
from stopwise.models.stopping import Caps
from stopwise.models.table_size import estimated_bytes, largest_table_values


@pytest.fixture(scope="module")
def demo_lottery(tmp_path_factory) -> tuple[pd.DataFrame, str]:
    """The demo's lottery list (invented data, used as input only, never as a check value)."""
    frame = demo_data(n_subjects=12)["lottery"]
    path = tmp_path_factory.mktemp("lottery") / "lottery.csv"
    frame.to_csv(path, index=False)
    return frame, str(path)


def _lowest_outcome(frame: pd.DataFrame) -> float:
    outcome_columns = [c for c in frame.columns if c[:3] in ("a_x", "b_x")]
    return float(frame[outcome_columns].min().min())


# --- item 6: outcome domain --------------------------------------------------------------


def test_readme_lottery_model_on_the_demo_losses_is_refused_with_the_fix(demo_lottery) -> None:
    frame, _ = demo_lottery
    lowest = _lowest_outcome(frame)
    assert lowest < 0  # the demo's mixed items hold losses (why the check must fire)
    with pytest.raises(StopwiseInputError, match=f"--wealth {-lowest:g}"):
        stopwise.fit("crra+logit", frame)
    with pytest.raises(StopwiseInputError, match="below zero for expo utility"):
        stopwise.compare(["pt+logit", "expo+logit"], frame, cv_folds=0)


def test_cli_fit_refuses_losses_and_writes_nothing(demo_lottery, tmp_path, capsys) -> None:
    _, path = demo_lottery
    out = tmp_path / "fit.json"
    assert main(["fit", path, "--model", "crra+logit", "--json", str(out)]) == 2
    assert "--wealth" in capsys.readouterr().err
    assert not out.exists()


def test_wealth_makes_the_same_data_fit(demo_lottery, tmp_path) -> None:
    frame, path = demo_lottery
    wealth = -_lowest_outcome(frame)
    out = tmp_path / "fit.json"
    args = ["fit", path, "--model", "crra+logit", "--wealth", f"{wealth:g}", "--json", str(out)]
    assert main(args) == 0
    assert json.loads(out.read_text())["converged"] is True
    result = stopwise.fit(build_model("crra+logit", wealth=wealth), frame)
    assert result.converged and math.isfinite(result.loglik)
    # a choice between two options cannot be worse than a coin flip at the optimum of a
    # model that includes random choice (precision -> 0): log-likelihood >= n log(1/2)
    # (common practice, no source)
    assert result.loglik >= len(frame) * math.log(0.5)


def test_prospect_theory_takes_losses_without_wealth(demo_lottery) -> None:
    frame, _ = demo_lottery
    model = build_model("pt+logit")
    bundle = stopwise.load(frame).arrays()
    model.options["prepare"](bundle)  # no refusal: pt is defined for losses
    loglik = np.asarray(model.loglik_obs(model.start_theta(), bundle))
    assert loglik.shape == (len(frame),) and np.all(np.isfinite(loglik))


def test_stopping_data_with_a_negative_start_are_refused_for_crra(decision_frame) -> None:
    frame = decision_frame.assign(start=-3.0)
    frame = frame[frame["task"] == "solo"]
    with pytest.raises(StopwiseInputError, match="outcomes down to -3"):
        stopwise.fit("crra+myopic+logit", frame, se=None)


# --- item 8: simulation parameters -------------------------------------------------------


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_simulate_refuses_non_finite_parameters_by_name(bad: float) -> None:
    design = stopping_design([1, 2], 3, [0.9], [1.0], 0.0, 0.0)
    with pytest.raises(StopwiseInputError, match="parameter r = "):
        stopwise.simulate("crra+myopic+logit", {"r": bad, "precision": 2.0}, design)
    population = pd.DataFrame({"subject": [1, 2], "r": [0.3, bad], "precision": [1.0, 1.0]})
    with pytest.raises(StopwiseInputError, match=r"subject 2.*parameter r"):
        stopwise.simulate("crra+myopic+logit", population, design)


def test_simulate_command_refuses_nan(tmp_path, capsys) -> None:
    out = tmp_path / "sim.csv"
    args = ["simulate", "--model", "crra+myopic+logit", "--set", "r=nan", "--out", str(out)]
    assert main(args) == 2
    assert "r=nan" in capsys.readouterr().err
    assert not out.exists()


# --- item 10: size limits ----------------------------------------------------------------


def test_simulate_subjects_beyond_the_limit_exit_2(tmp_path, capsys) -> None:
    out = tmp_path / "sim.csv"
    args = ["simulate", "--model", "crra+myopic+logit", "--subjects", "1000000000"]
    assert main([*args, "--trials", "30", "--out", str(out)]) == 2
    assert f"limit of {limits.MAX_SIMULATED_TRIALS}" in capsys.readouterr().err
    assert not out.exists()


def test_max_target_beyond_the_limit_exit_2(decision_frame, tmp_path, capsys) -> None:
    path = tmp_path / "d.csv"
    decision_frame.to_csv(path, index=False)
    args = ["fit", str(path), "--model", "crra+target+logit", "--max-target", "1000000000"]
    assert main(args) == 2
    assert f"at most {limits.MAX_TARGET}" in capsys.readouterr().err
    build_model("crra+target+logit", max_target=limits.MAX_TARGET)  # the limit itself is fine
    with pytest.raises(StopwiseInputError, match=f"at most {limits.MAX_TARGET}"):
        build_model("crra+qre", max_target=1_000_000_000)  # contest models alike


def test_more_types_than_subjects_exit_2(demo_lottery, capsys) -> None:
    _, path = demo_lottery
    args = ["fit", path, "--model", "pt+logit", "--types", "50"]
    assert main(args) == 2
    assert f"limit of {limits.MAX_TYPES} types" in capsys.readouterr().err
    assert main(["fit", path, "--model", "pt+logit", "--types", "12"]) == 2
    assert "needs more subjects than types" in capsys.readouterr().err


def _one_condition_data(p_survive: float, n_conditions: int = 1) -> object:
    rows = [
        ("s1", t + 1, 0, p, 1.0, "stop", None)
        for t, p in enumerate(np.linspace(p_survive, p_survive - 0.001, n_conditions))
    ]
    frame = pd.DataFrame(
        rows, columns=["subject", "trial", "step", "p_survive", "gain", "action", "outcome"]
    )
    return stopwise.load(frame).arrays()


def test_probit_target_model_at_p_0999_is_refused_with_the_limit() -> None:
    model = build_model("crra+target+probit")
    with pytest.raises(StopwiseInputError, match=r"GiB .*limit of 2 GiB.*--max-target"):
        model.options["prepare"](_one_condition_data(0.999))
    build_model("crra+target+logit").options["prepare"](_one_condition_data(0.999))  # linear
    build_model("crra+target+probit").options["prepare"](_one_condition_data(0.99))  # fits


def test_cli_fit_and_simulate_refuse_the_probit_target_table(tmp_path, capsys) -> None:
    frame = pd.DataFrame(
        [("s1", 1, 0, 0.999, 1.0, "stop", None)],
        columns=["subject", "trial", "step", "p_survive", "gain", "action", "outcome"],
    )
    path = tmp_path / "long_odds.csv"
    frame.to_csv(path, index=False)
    assert main(["fit", str(path), "--model", "crra+target+probit"]) == 2
    assert "limit of 2 GiB" in capsys.readouterr().err
    out = tmp_path / "sim.csv"
    args = ["simulate", "--model", "crra+target+probit", "--p-survive", "0.999"]
    assert main([*args, "--out", str(out)]) == 2
    assert "limit of 2 GiB" in capsys.readouterr().err
    assert not out.exists()


def _largest_intermediate(spec: str, data: object) -> int:
    """Size of the largest array in the traced log-likelihood (counted from the program
    JAX builds, independently of the estimate)."""
    model = build_model(spec)
    model.options["prepare"](data)
    theta = model.start_theta()
    jaxpr = jax.make_jaxpr(lambda t: model.loglik_obs(t, data))(theta)
    sizes = [0]

    def visit(eqns) -> None:
        for eqn in eqns:
            sizes.extend(int(np.prod(v.aval.shape)) for v in eqn.outvars if hasattr(v, "aval"))
            for param in eqn.params.values():
                inner = getattr(param, "jaxpr", None)
                if inner is not None:
                    visit(
                        getattr(inner, "eqns", getattr(getattr(inner, "jaxpr", None), "eqns", []))
                    )

    visit(jaxpr.jaxpr.eqns)
    return max(sizes)


@pytest.mark.parametrize(
    ("spec", "policy", "noise"),
    [
        ("crra+target+probit", "target", "probit"),
        ("crra+target+logit", "target", "logit"),
        ("crra+planner+logit", "planner", "logit"),
    ],
)
def test_table_estimate_matches_the_traced_program(spec: str, policy: str, noise: str) -> None:
    data = _one_condition_data(0.9, n_conditions=2)
    model = build_model(spec)
    model.options["prepare"](data)
    caps = Caps().sized_for(data.cond_p_survive)
    estimate = largest_table_values(policy, noise, 2, int(data.horizon), caps)
    assert estimate == _largest_intermediate(spec, data)
    assert estimated_bytes(policy, noise, 2, int(data.horizon), caps) == 48 * estimate
