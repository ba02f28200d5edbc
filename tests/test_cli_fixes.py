"""Issue 12, item 6: the small things a careful user of the command line trips over."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise import cli
from stopwise.data_schemas.convert import decisions_to_trials, trials_to_decisions
from stopwise.estimation.ml.covariance import covariance_for
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.optimize import GRAD_TOL, OptimumRecord, optimizer_message
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

SNAKE_CASE = re.compile(r"^[a-z][a-z0-9_.]*$")
SCIPY_TRUST_NOTE = "A bad approximation caused failure to predict improvement."


@pytest.fixture(scope="module")
def choices_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    design = stopping_design(12, 15, (0.6, 0.8), 1.0, 5)
    frame = build_model("linear+myopic+logit").simulate(
        {"precision": 2.0}, design, jax.random.PRNGKey(5)
    )
    path = tmp_path_factory.mktemp("fixes") / "choices.csv"
    frame.to_csv(path, index=False)
    return path


def run_cli(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = cli.main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_numpy_floating_point_warnings_become_one_note(
    choices_file: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import stopwise.describe as describe_module

    real = describe_module.describe

    def overflowing_describe(*args: object, **kw: object) -> object:
        np.exp(np.array([1000.0]))  # numpy: "overflow encountered in exp"
        return real(*args, **kw)

    monkeypatch.setattr(describe_module, "describe", overflowing_describe)
    code, out, err = run_cli(["describe", str(choices_file)], capsys)
    assert code == 0 and "Stopping data by condition" in out
    assert "RuntimeWarning" not in err
    assert "numpy reported 1 floating-point warning(s) (overflow encountered in exp)" in err


@pytest.mark.slow
def test_compare_shows_no_raw_runtime_warnings(tmp_path: Path) -> None:
    """A real case: scipy's trust-region steps overflow while fitting these probit data from a
    far start; the overflow is silenced where it arises (estimation/ml/optimize.py
    ``minimize_one``; the run is judged by its own gradient), so nothing reaches the user."""
    data = tmp_path / "probit.csv"
    simulate = ["simulate", "--model", "crra+myopic+probit", "--set", "r=0.5", "--set"]
    assert (
        cli.main([*simulate, "sigma=0.5", "--subjects", "30", "--seed", "3", "--out", str(data)])
        == 0
    )
    compare = ["compare", str(data), "--model", "crra+myopic+probit", "--model"]
    done = subprocess.run(
        [sys.executable, "-m", "stopwise", *compare, "crra+myopic+logit", "--cv-folds", "0"],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0 and "Model comparison" in done.stdout
    assert "RuntimeWarning" not in done.stderr and "warnings.warn" not in done.stderr
    assert "numpy reported" not in done.stderr
    assert "crra+myopic+probit" in done.stdout and "crra+myopic+logit" in done.stdout


def test_fit_help_shows_95_percent_once(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        cli.main(["fit", "--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    assert "95% intervals" in re.sub(r"\s+", " ", text) and "%%" not in text
    assert "mean depth of a binomial mixture" in re.sub(r"\s+", " ", text)


def test_robust_standard_errors_state_their_clusters_when_the_hessian_fails(
    choices_file: Path,
) -> None:
    fit = fit_mle(
        build_model("linear+myopic+logit"), stopwise.load(choices_file).arrays(), se="robust"
    )
    problem = fit.extras["problem"]
    singular = np.zeros((problem.k, problem.k))
    cov, warned, info = covariance_for(problem, np.asarray(fit.z), singular, "robust")
    assert cov is None and any("not positive definite" in w for w in warned)
    assert info["clusters"] == 12  # the subjects of choices_file


def test_a_converged_fit_does_not_report_scipys_failure_note() -> None:
    converged = OptimumRecord(np.zeros(2), 1.0, GRAD_TOL / 10, 12, True, SCIPY_TRUST_NOTE)
    stalled = OptimumRecord(np.zeros(2), 1.0, 0.5, 200, False, SCIPY_TRUST_NOTE)
    assert "fail" not in optimizer_message(converged)
    assert optimizer_message(converged).startswith("converged: max |gradient|")
    assert optimizer_message(stalled) == SCIPY_TRUST_NOTE  # an unconverged run keeps it


def test_types_fit_points_to_the_json_key_and_states_clusters(
    choices_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_json = tmp_path / "types.json"
    code, out, _ = run_cli(
        [
            "fit",
            str(choices_file),
            "--model",
            "linear+myopic+logit",
            "--types",
            "2",
            "--no-progress",
            "--json",
            str(out_json),
        ],
        capsys,
    )
    assert code == 0
    assert "JSON key type_probabilities" in out
    assert "SE: robust" in out and "Clusters: 12" in out
    result = json.loads(out_json.read_text())
    assert len(result["type_probabilities"]) == 12 and result["clusters"] == 12
    if result["converged"]:
        assert "fail" not in result["optimizer"]["message"]


@pytest.mark.parametrize("name", ["sim.txt", "sim.xlsx", "sim"])
def test_simulate_refuses_undocumented_output_formats(
    name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / name
    code, _, err = run_cli(
        ["simulate", "--model", "crra+myopic+logit", "--out", str(target)], capsys
    )
    assert code == 2 and ".csv or .parquet" in err
    assert not target.exists() and list(tmp_path.iterdir()) == []


def test_lottery_simulation_never_repeats_the_price_list(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "list.csv"
    args = ["simulate", "--model", "crra+logit", "--subjects", "3", "--out", str(target)]
    code, _, err = run_cli([*args, "--trials", "30"], capsys)
    assert code == 2 and "10 rows" in err and not target.exists()
    assert run_cli(args, capsys)[0] == 0
    frame = pd.read_csv(target)
    assert (
        frame.groupby("subject")["item"].apply(lambda s: sorted(s)).tolist()
        == [list(range(1, 11))] * 3
    )
    # Holt & Laury (2002), Table 1 (from memory): row k pays the high outcome with chance
    # k/10; option A 2.00 or 1.60, option B 3.85 or 0.10
    row = frame[(frame["subject"] == 1) & (frame["item"] == 3)].iloc[0]
    assert (row["a_x1"], row["a_x2"], row["b_x1"], row["b_x2"]) == (2.0, 1.6, 3.85, 0.1)
    assert row["a_p1"] == pytest.approx(0.3) and row["b_p2"] == pytest.approx(0.7)


def test_decisions_keep_their_bank_through_trial_level() -> None:
    decisions = pd.DataFrame(
        {
            "subject": ["a", "a", "a", "a", "a"],
            "trial": [1, 1, 1, 2, 2],
            "step": [0, 1, 2, 0, 1],
            "p_survive": 0.8,
            "gain": 2.0,
            "action": ["draw", "draw", "stop", "draw", "draw"],
            "outcome": ["success", "success", np.nan, "success", "bust"],
            "bank": [5.0, 7.0, 9.0, 5.0, 7.0],  # start 5 + step * gain 2, by hand
            "start": 5.0,
        }
    )
    again = trials_to_decisions(decisions_to_trials(decisions))
    pd.testing.assert_frame_equal(again[decisions.columns], decisions)


def _keys(value: object) -> list[str]:
    if isinstance(value, dict):
        return [k for key, v in value.items() for k in [key, *_keys(v)]]
    if isinstance(value, list):
        return [k for v in value for k in _keys(v)]
    return []


def test_validate_json_keys_are_snake_case(
    decision_frame: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "mixed.csv"
    decision_frame.to_csv(path, index=False)
    code, out, _ = run_cli(["validate", str(path), "--json"], capsys)
    assert code == 0
    report = json.loads(out)
    keys = _keys(report)
    assert keys and all(SNAKE_CASE.match(k) for k in keys), keys
    assert report["stats"]["rows_by_task"] == {"solo": 4, "contest": 3}
    assert report["stats"]["covariates"] == ["age"]
    code, out, _ = run_cli(["validate", str(path)], capsys)
    assert "p_survive values: 0.8, 0.9" in out and "rows by task: solo 4, contest 3" in out


def test_describe_leaves_contest_fields_empty_on_solo_rows(
    decision_frame: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "mixed.csv"
    decision_frame.to_csv(path, index=False)
    code, out, _ = run_cli(["describe", str(path), "--json", "-"], capsys)
    assert code == 0
    rows = json.loads(out)["table"]
    solo = [r for r in rows if r["task"] == "solo"]
    contest = [r for r in rows if r["task"] == "contest"]
    assert solo and all(r["prize"] is None and r["keep_bank"] is None for r in solo)
    assert [(r["prize"], r["keep_bank"]) for r in contest] == [(10.0, 0)]
    code, text, _ = run_cli(["describe", str(path)], capsys)
    solo_lines = [line for line in text.splitlines() if "task=solo" in line]
    assert solo_lines and not any("prize" in line or "keep_bank" in line for line in solo_lines)


def test_import_stopwise_exposes_only_its_public_names() -> None:
    plain_probe = (
        "import json, stopwise\n"
        "print(json.dumps(sorted(n for n in vars(stopwise) if not n.startswith('_'))))\n"
        "print(json.dumps(dir(stopwise) == sorted(stopwise.__all__)))\n"
    )
    star_probe = (
        "before = set(dir())\n"
        "from stopwise import *\n"
        "import json\n"
        "print(json.dumps(sorted(set(dir()) - before - {'before', 'json'})))\n"
    )
    outputs = [
        subprocess.run(
            [sys.executable, "-c", probe], capture_output=True, text=True, timeout=120, check=True
        ).stdout.splitlines()
        for probe in (plain_probe, star_probe)
    ]
    (plain, dir_ok), (star,) = outputs
    assert json.loads(plain) == []
    assert json.loads(dir_ok) is True
    assert set(json.loads(star)) == set(stopwise.__all__)
    assert not {"Any", "jax", "importlib", "annotations"} & set(stopwise.__all__)


@pytest.mark.slow
def test_level_k_fit_explains_its_level(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "contest.csv"
    simulate = ["simulate", "--model", "linear+levelk", "--set", "precision=2", "--set"]
    simulate += ["level=1.5", "--subjects", "10", "--trials", "6", "--p-survive", "0.8"]
    assert run_cli([*simulate, "--max-target", "12", "--out", str(data)], capsys)[0] == 0
    argv = ["fit", str(data), "--model", "linear+levelk", "--max-target", "12", "--json", "-"]
    code, out, _ = run_cli([*argv, "--no-progress"], capsys)
    assert code == 0
    result = json.loads(out)
    assert "level" in [p["name"] for p in result["params"]]
    assert any("mean depth of a population of levels 0..6" in n for n in result["notes"])
    fixed_depth = build_model("linear+levelk", level=2)  # --option level=2
    assert "level" not in fixed_depth.param_names and not fixed_depth.options["notes"]
