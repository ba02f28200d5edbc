"""Issue 12, item 7: the command line drives a whole study (simulate populations and
contests, model options, joint fits, describe --by, per-subject Bayes, recover)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise import cli

SHARP = "5000"  # a logit precision at which every choice follows the better option


def run_cli(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = cli.main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def myopic_stop_step(r: float, p: float, gain: float = 1.0, wealth: float = 0.0) -> int:
    """The one-step look-ahead rule by hand (common practice, no source): with bank b = k g,
    draw while p u(w + b + g) + (1 - p) u(w) > u(w + b), u(x) = x^(1-r)/(1-r) (x at r = 0);
    returns the first k at which the rule stops."""

    def u(x: float) -> float:
        return x if r == 0 else x ** (1 - r) / (1 - r)

    k = 0
    while p * u(wealth + (k + 1) * gain) + (1 - p) * u(wealth) > u(wealth + k * gain):
        k += 1
    return k


def stop_steps(path: Path, by: str) -> dict[object, set[int]]:
    frame = pd.read_csv(path)
    stops = frame[frame["action"] == "stop"]
    return {key: set(group["step"]) for key, group in stops.groupby(by)}


def test_myopic_rule_by_hand_has_the_expected_thresholds() -> None:
    # p g / (1 - p) = 2.33 for p = 0.7: a risk-neutral player stops at bank 3
    assert myopic_stop_step(0.0, 0.7) == 3
    assert myopic_stop_step(0.5, 0.7) == 1
    assert myopic_stop_step(0.5, 0.7, wealth=5.0) == 3


def test_simulate_takes_per_subject_parameters_from_a_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    params = tmp_path / "people.csv"
    params.write_text(f"subject,r,precision\nneutral,0,{SHARP}\naverse,0.5,{SHARP}\n")
    out = tmp_path / "sim.csv"
    argv = ["simulate", "--model", "crra+myopic+logit", "--params", str(params)]
    argv += ["--trials", "120", "--p-survive", "0.7", "--out", str(out)]
    assert run_cli(argv, capsys)[0] == 0
    steps = stop_steps(out, "subject")
    assert steps == {
        "neutral": {myopic_stop_step(0.0, 0.7)},
        "averse": {myopic_stop_step(0.5, 0.7)},
    }

    bad = tmp_path / "bad.csv"
    bad.write_text("subject,r\nx,0.1\ny,lots\n")
    argv[argv.index(str(params))] = str(bad)
    out.unlink()
    code, _, err = run_cli(argv, capsys)
    assert code == 2 and "bad.csv, line 3, column 'r'" in err and not out.exists()


def test_simulate_covariate_effects(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "sim.csv"
    argv = ["simulate", "--model", "crra+myopic+logit", "--set", "r=0", "--set"]
    argv += [f"precision={SHARP}", "--covariate", "treatment=0,1", "--effect", "r:treatment=0.5"]
    argv += ["--subjects", "4", "--trials", "80", "--p-survive", "0.7", "--out", str(out)]
    assert run_cli(argv, capsys)[0] == 0
    frame = pd.read_csv(out)
    per_subject = frame.groupby("subject")["treatment"].first()
    assert per_subject.tolist() == [0, 1, 0, 1]
    assert stop_steps(out, "treatment") == {
        0: {myopic_stop_step(0.0, 0.7)},
        1: {myopic_stop_step(0.5, 0.7)},
    }
    argv[argv.index("r:treatment=0.5")] = "r:age=0.5"
    code, _, err = run_cli(argv, capsys)
    assert code == 2 and "--covariate age" in err


def test_simulate_option_wealth_moves_the_stopping_point(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "sim.csv"
    argv = ["simulate", "--model", "crra+myopic+logit", "--set", "r=0.5", "--set"]
    argv += [f"precision={SHARP}", "--subjects", "2", "--trials", "80", "--p-survive", "0.7"]
    assert run_cli([*argv, "--option", "wealth=5", "--out", str(out)], capsys)[0] == 0
    assert set().union(*stop_steps(out, "subject").values()) == {myopic_stop_step(0.5, 0.7, 1, 5)}
    code, _, err = run_cli([*argv, "--option", "wealth", "--out", str(out)], capsys)
    assert code == 2 and "NAME=VALUE" in err


def test_simulate_contests_in_groups(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "contest.csv"
    argv = ["simulate", "--model", "linear+nash", "--set", "tremble=1e-9", "--subjects", "8"]
    argv += ["--trials", "12", "--p-survive", "0.7", "--prize", "0.001", "--keep-bank"]
    argv += ["--max-target", "12", "--out", str(out)]
    assert run_cli(argv, capsys)[0] == 0
    assert stopwise.validate(out).ok
    frame = pd.read_csv(out)
    assert set(frame["task"]) == {"contest"}
    assert frame.groupby(["trial", "group"])["subject"].nunique().eq(2).all()
    assert (frame["prize"].unique().tolist(), frame["keep_bank"].unique().tolist()) == (
        [0.001],
        [1],
    )
    # with a negligible prize and own banks kept, the contest is the solo task: the target n
    # maximising the expected bank n g p^n (common practice, no source); p = 0.7 -> n = 3
    best = max(range(1, 12), key=lambda n: n * 0.7**n)
    assert stop_steps(out, "task") == {"contest": {best}}
    argv[argv.index("8")] = "3"
    code, _, err = run_cli(argv, capsys)
    assert code == 2 and "groups of --players 2" in err


@pytest.fixture(scope="module")
def lottery_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("lottery") / "list.csv"
    argv = ["simulate", "--model", "crra+logit", "--set", "r=0.5", "--set", "precision=3"]
    assert cli.main([*argv, "--option", "wealth=2", "--subjects", "30", "--out", str(path)]) == 0
    return path


@pytest.mark.slow
def test_compare_option_reaches_every_model(
    lottery_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = ["compare", str(lottery_file), "--model", "crra+logit", "--model", "cara+logit"]
    argv += ["--cv-folds", "0", "--json", "-"]
    plain = json.loads(run_cli(argv, capsys)[1])
    rich = json.loads(run_cli([*argv, "--option", "wealth=20"], capsys)[1])
    assert "model options: wealth=20" in rich["notes"]

    def estimates(result: dict, name: str) -> dict[str, float]:
        fit = next(f for f in result["fits"] if f["model"] == name)
        return {p["name"]: p["estimate"] for p in fit["params"]}

    # CARA: u(w + x) = (1 - exp(-a w) exp(-a x)) / a, so wealth leaves a unchanged and
    # multiplies every utility difference by exp(-a w): the logit precision absorbs
    # exp(a w) (constant absolute risk aversion; common practice, no source). CRRA's r moves.
    cara_plain, cara_rich = estimates(plain, "cara+logit"), estimates(rich, "cara+logit")
    assert cara_rich["a"] == pytest.approx(cara_plain["a"], rel=1e-5)
    assert cara_rich["precision"] == pytest.approx(
        cara_plain["precision"] * math.exp(20 * cara_plain["a"]), rel=1e-4
    )
    r_plain, r_rich = estimates(plain, "crra+logit")["r"], estimates(rich, "crra+logit")["r"]
    assert abs(r_rich - r_plain) > 0.1


def test_fit_option_matches_the_python_model(
    lottery_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = ["fit", str(lottery_file), "--model", "crra+logit", "--option", "wealth=2"]
    result = json.loads(run_cli([*argv, "--json", "-"], capsys)[1])
    direct = stopwise.fit(stopwise.model("crra+logit", wealth=2), lottery_file)
    assert result["loglik"] == pytest.approx(direct.loglik, abs=1e-6)
    assert "model options: wealth=2" in result["notes"]


def _loglik_of(argv: list[str], capsys: pytest.CaptureFixture[str]) -> dict:
    code, out, _ = run_cli([*argv, "--no-progress", "--json", "-"], capsys)
    assert code == 0
    return json.loads(out)


@pytest.mark.slow
def test_joint_fit_equals_separate_fits_at_the_shared_value(
    lottery_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    stopping = tmp_path / "dives.csv"
    wealth = ["--option", "wealth=2"]  # as in lottery_file; --option applies to every model
    argv = ["simulate", "--model", "crra+myopic+probit", "--set", "r=0.5", "--set", "sigma=0.5"]
    argv += [*wealth, "--subjects", "30", "--seed", "3", "--out", str(stopping)]
    assert run_cli(argv, capsys)[0] == 0
    fit_stopping = ["fit", str(stopping), "--model", "crra+myopic+probit", *wealth]
    joint = _loglik_of(
        [*fit_stopping, "--model", "crra+logit", "--joint", str(lottery_file)], capsys
    )
    assert [p["name"] for p in joint["params"]] == ["r", "sigma", "precision"]
    assert "shared across data sets: r" in joint["notes"] and joint["converged"]
    r = next(p["estimate"] for p in joint["params"] if p["name"] == "r")
    assert abs(r - 0.5) < 0.2  # both data sets were drawn at r = 0.5
    # given r the two parts share nothing, so the joint maximum is the sum of the two
    # maxima with r held at the joint estimate (a profile likelihood; common practice)
    fit_lottery = ["fit", str(lottery_file), "--model", "crra+logit", *wealth]
    parts = [
        _loglik_of([*argv_, "--fix", f"r={r!r}"], capsys) for argv_ in (fit_stopping, fit_lottery)
    ]
    assert all(p["converged"] for p in parts)
    assert joint["loglik"] == pytest.approx(sum(p["loglik"] for p in parts), abs=1e-5)
    code, _, err = run_cli([*fit_stopping, "--joint", str(lottery_file)], capsys)
    assert code == 2 and "one --model for DATA and one per --joint file" in err


def test_describe_by_a_covariate(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "sim.csv"
    argv = ["simulate", "--model", "linear+myopic+logit", "--covariate", "treatment=0,1"]
    assert (
        run_cli([*argv, "--subjects", "6", "--p-survive", "0.8", "--out", str(data)], capsys)[0]
        == 0
    )
    code, out, _ = run_cli(["describe", str(data), "--by", "treatment", "--json", "-"], capsys)
    assert code == 0
    table = pd.DataFrame(json.loads(out)["table"]).set_index("treatment")
    frame = pd.read_csv(data)  # the same numbers straight from the file with pandas
    busts = frame[frame["outcome"] == "bust"].groupby("treatment").size()
    trials = frame.groupby("treatment")[["subject", "trial"]].apply(
        lambda g: len(g.drop_duplicates())
    )
    assert table["n_subjects"].to_dict() == {0: 3, 1: 3}
    for value in (0, 1):
        assert table.loc[value, "bust_rate"] == pytest.approx(busts.get(value, 0) / trials[value])
    code, _, err = run_cli(["describe", str(data), "--by", "age"], capsys)
    assert code == 2 and "no column 'age'" in err
    code, _, err = run_cli(["describe", str(data), "--by", "step"], capsys)
    assert code == 2 and "column 'step': the value changes within a trial" in err


def test_hierarchical_bayes_reports_each_subject(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import stopwise.commands.fit as fit_command

    data = tmp_path / "six.csv"
    argv = ["simulate", "--model", "linear+myopic+logit", "--set", "precision=1.5"]
    assert run_cli([*argv, "--subjects", "6", "--trials", "20", "--out", str(data)], capsys)[0] == 0
    shown: list = []  # the result object the command prints, kept for its posterior draws
    real_emit = fit_command.emit
    monkeypatch.setattr(fit_command, "emit", lambda r, path: (shown.append(r), real_emit(r, path)))
    out_json = tmp_path / "hier.json"
    argv = ["fit", str(data), "--model", "linear+myopic+logit", "--method", "bayes"]
    argv += ["--hierarchical", "--chains", "2", "--draws", "150", "--warmup", "150"]
    code, text, _ = run_cli([*argv, "--no-progress", "--json", str(out_json)], capsys)
    assert code == 0
    rows = json.loads(out_json.read_text())["subjects"]
    assert [(r["subject"], r["param"]) for r in rows] == [(s, "precision") for s in range(1, 7)]
    draws = shown[0].draws("precision_subject")  # (chains * draws, subjects), from ArviZ
    for s, row in enumerate(rows):
        assert row["estimate"] == pytest.approx(float(np.mean(draws[:, s])), rel=1e-9)
        assert row["ci_low"] <= row["estimate"] <= row["ci_high"]
    assert "subject estimates (posterior mean [95% HDI]" in text
    assert f"{rows[0]['estimate']:.4g} [{rows[0]['ci_low']:.4g}" in text


@pytest.mark.slow
def test_recover_command_reports_bias_and_coverage(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "recovery.json"
    argv = ["recover", "--model", "linear+myopic+logit", "--set", "precision=1.5", "--reps", "5"]
    argv += ["--subjects", "15", "--trials", "15", "--rival", "linear+target+logit"]
    code, text, _ = run_cli([*argv, "--no-progress", "--json", str(out)], capsys)
    assert code == 0 and "Parameter recovery for linear+myopic+logit" in text
    result = json.loads(out.read_text())
    (row,) = result["params"]
    assert (row["name"], row["truth"], row["replications"]) == ("precision", 1.5, 5)
    assert row["bias"] == pytest.approx(row["mean"] - 1.5)
    # maximum likelihood is consistent: the mean of 5 estimates lies within 4 standard
    # errors of the truth (common practice, no source)
    assert abs(row["bias"]) < 4 * row["sd"] / math.sqrt(5)
    assert 0.0 <= row["coverage_95"] <= 1.0
    assert result["selection"]["replications"] == 5
    assert result["selection"]["rivals"] == ["linear+target+logit"]
    code, _, err = run_cli(["recover", "--model", "linear+myopic+logit", "--reps", "1"], capsys)
    assert code == 2 and "--reps" in err


def test_readme_lists_every_command() -> None:
    readme = (Path(__file__).parents[1] / "README.md").read_text()
    missing = [name for name in cli.COMMANDS if f"stopwise {name}" not in readme]
    assert missing == []
    assert "stopwise recover --model" in readme and "--joint" in readme


def test_simulating_an_unsolved_qre_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # At precision 2000 x a payoff range of ~12 the QRE's continuation misses its fixed point
    # (residual check, McKelvey & Palfrey 1995): nothing is simulated from such an answer.
    out = tmp_path / "contest.csv"
    argv = ["simulate", "--model", "linear+qre", "--set", "precision=2000", "--subjects", "8"]
    argv += ["--trials", "12", "--p-survive", "0.7", "--prize", "0.001", "--keep-bank"]
    argv += ["--max-target", "12", "--out", str(out)]
    code, _, err = run_cli(argv, capsys)
    assert code == 1 and "not solved" in err and not out.exists()
