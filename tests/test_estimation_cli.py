"""``stopwise fit`` / ``stopwise compare`` and the public face ``stopwise.fit``/``compare``."""

from __future__ import annotations

import json
from pathlib import Path

import jax
import pytest
from contract import DESIGN_KEYS

import stopwise
from stopwise import cli
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model


@pytest.fixture(scope="module")
def data_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    design = stopping_design(24, 20, (0.6, 0.75, 0.9), 1.0, 11)
    frame = build_model("linear+myopic+logit").simulate(
        {"precision": 0.8}, design, jax.random.PRNGKey(11)
    )
    frame["treatment"] = frame["subject"].str[-1].astype(int) % 2
    path = tmp_path_factory.mktemp("cli") / "choices.csv"
    frame.to_csv(path, index=False)
    return path


def test_fit_writes_the_design_json(
    data_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "fit.json"
    code = cli.main(
        [
            "fit",
            str(data_file),
            "--model",
            "linear+myopic+logit",
            "--formula",
            "precision ~ 1 + treatment",
            "--profile",
            "precision",
            "--json",
            str(out),
        ]
    )
    assert code == 0
    text = capsys.readouterr().out
    assert "precision:treatment" in text and "Clusters: 24" in text
    assert "profile-likelihood interval for precision" in text
    result = json.loads(out.read_text())
    assert DESIGN_KEYS <= set(result)
    assert [p["name"] for p in result["params"]] == ["precision", "precision:treatment"]
    assert any("below about 30" in w for w in result["warnings"])


def test_fit_by_subject_json(data_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert (
        cli.main(
            [
                "fit",
                str(data_file),
                "--model",
                "linear+myopic+logit",
                "--by",
                "subject",
                "--json",
                "-",
            ]
        )
        == 0
    )
    result = json.loads(capsys.readouterr().out)
    assert result["by"] == "subject" and len(result["fits"]) == 24
    assert DESIGN_KEYS <= set(result["fits"][0]) and "subject" in result["fits"][0]


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (
            ["--model", "linear+myopic+logit", "--formula", "precision ~ 1 + shoe_size"],
            "known covariate columns",
        ),
        (["--model", "crra+logit"], "lottery model"),
        (["--model", "linear+myopic+logit", "--fix", "precision"], "NAME=VALUE"),
        (
            ["--model", "linear+myopic+logit", "--by", "subject", "--se", "bootstrap"],
            "Hessian standard errors",
        ),
    ],
)
def test_bad_input_exits_2_and_writes_nothing(
    data_file: Path,
    tmp_path: Path,
    argv: list[str],
    message: str,
    capsys: pytest.CaptureFixture[str],
) -> None:
    out = tmp_path / "never.json"
    assert cli.main(["fit", str(data_file), *argv, "--json", str(out)]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err
    assert not out.exists()


def test_compare_command(
    data_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "cmp.json"
    assert (
        cli.main(
            [
                "compare",
                str(data_file),
                "--model",
                "linear+myopic+logit",
                "--model",
                "linear+myopic+probit",
                "--cv-folds",
                "3",
                "--json",
                str(out),
            ]
        )
        == 0
    )
    assert "Model comparison" in capsys.readouterr().out
    result = json.loads(out.read_text())
    assert {m["model"] for m in result["models"]} == {"linear+myopic+logit", "linear+myopic+probit"}
    assert {t["test"] for t in result["tests"]} == {
        "Vuong (Schwarz-corrected)",
        "Clarke sign (Schwarz-corrected)",
    }
    assert cli.main(["compare", str(data_file), "--model", "linear+myopic+logit"]) == 2


def test_public_fit_accepts_paths_and_refuses_bad_options(data_file: Path) -> None:
    fit = stopwise.fit("linear+myopic+logit", str(data_file), se="hessian")
    assert fit.converged and fit.se_method == "hessian"
    with pytest.raises(StopwiseInputError, match="unknown method"):
        stopwise.fit("linear+myopic+logit", str(data_file), method="magic")
    with pytest.raises(StopwiseInputError, match="standard-error method"):
        stopwise.fit("linear+myopic+logit", str(data_file), se="jackknife")


def test_public_recover_with_spec_rivals() -> None:
    result = stopwise.recover(
        "linear+myopic+logit",
        {"precision": 0.8},
        n_reps=3,
        subjects=12,
        trials=15,
        rivals=["linear+myopic+probit"],
        progress=False,
    )
    assert list(result.table.index) == ["precision"]
    assert result.selection["replications"] == 3 and result.selection["rivals"] == [
        "linear+myopic+probit"
    ]
    with pytest.raises(StopwiseInputError, match="needs a design"):
        stopwise.recover("crra+logit", {"r": 0.3, "precision": 1.0}, n_reps=1)


def test_command_line_gives_each_chain_a_cpu_device() -> None:
    flag = "--xla_force_host_platform_device_count"
    assert cli.host_device_flags(None, 0) == f"{flag}=4"
    assert cli.host_device_flags(None, 6) == f"{flag}=6"
    assert cli.host_device_flags("--xla_cpu_foo=1", 2) == f"--xla_cpu_foo=1 {flag}=4"
    assert cli.host_device_flags(f"{flag}=2", 8) is None  # the user's choice stands


def test_a_fresh_command_line_process_runs_chains_on_parallel_devices(tmp_path: Path) -> None:
    import os
    import subprocess
    import sys

    code = (
        "import sys, jax; from stopwise import cli; "
        "args = cli.build_parser().parse_args(sys.argv[1:]); cli.give_chains_their_devices(args); "
        "print(jax.local_device_count())"
    )
    env = {k: v for k, v in os.environ.items() if k != "XLA_FLAGS"}
    args = ["fit", "x.csv", "--model", "crra+myopic+logit", "--chains", "5"]
    out = subprocess.run(
        [sys.executable, "-c", code, *args], env=env, capture_output=True, text=True, check=True
    )
    assert out.stdout.strip() == "5"


def test_bayes_parametrisation_option_reaches_the_sampler(
    data_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import stopwise.api

    seen: dict = {}

    class Recorded:
        def summary(self) -> str:
            return "recorded"

        def to_dict(self) -> dict:
            return {}

    def record(*args, **kwargs):
        seen.update(kwargs)
        return Recorded()

    monkeypatch.setattr(stopwise.api, "fit", record)
    base = ["fit", str(data_file), "--model", "linear+myopic+logit"]
    for choice in ("centred", "noncentred"):
        argv = [*base, "--method", "bayes", "--hierarchical", "--parametrisation", choice]
        assert cli.main(argv) == 0
        assert seen["parametrisation"] == choice and seen["hierarchical"] is True
    assert cli.main([*base, "--parametrisation", "centred"]) == 2  # ML fits have no such choice
    assert seen["planner_cap"] == "auto"
    assert cli.main([*base, "--method", "bayes", "--planner-cap", "exact"]) == 0
    assert seen["planner_cap"] == "exact"
    assert cli.main([*base, "--planner-cap", "exact"]) == 2  # an ML fit has no automatic cap
    assert cli.main([*base, "--method", "bayes"]) == 0
    assert seen["loo"] is None  # the engine picks: subject with several subjects
    assert cli.main([*base, "--method", "bayes", "--loo", "trial"]) == 0
    assert seen["loo"] == "trial"
    assert cli.main([*base, "--loo", "subject"]) == 2  # leave-one-out units are a Bayes choice


@pytest.fixture(scope="module")
def two_type_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    import pandas as pd

    design = stopping_design(16, 30, (0.6, 0.75, 0.9), 1.0, 12)
    model = build_model("linear+myopic+logit")
    frames = [
        model.simulate({"precision": 0.3 if i % 2 else 3.0}, sub, jax.random.PRNGKey(40 + i))
        for i, (_, sub) in enumerate(design.groupby("subject", sort=True))
    ]
    path = tmp_path_factory.mktemp("types") / "two_types.csv"
    pd.concat(frames, ignore_index=True).to_csv(path, index=False)
    return path


def test_fit_types_is_the_mixture_engine_with_subject_type_probabilities(
    two_type_file: Path, tmp_path: Path
) -> None:
    import numpy as np

    from stopwise.estimation.ml.mixture import fit_mixture

    out = tmp_path / "types.json"
    argv = ["fit", str(two_type_file), "--model", "linear+myopic+logit", "--types", "2"]
    assert cli.main([*argv, "--se", "hessian", "--json", str(out), "--no-progress"]) == 0
    result = json.loads(out.read_text())
    assert DESIGN_KEYS <= set(result)
    names = [p["name"] for p in result["params"]]
    assert names == ["type1:precision", "type2:precision", "share:type1", "share:type2"]
    # the command line is the Python engine with the same settings
    from stopwise.api import resolve_data

    bundle, _ = resolve_data(str(two_type_file))
    direct = fit_mixture(build_model("linear+myopic+logit"), bundle, k=2, se="hessian", seed=0)
    np.testing.assert_allclose(
        [p["estimate"] for p in result["params"]], direct.table.estimate, rtol=1e-6
    )
    probabilities = result["type_probabilities"]
    assert len(probabilities) == 16
    for row in probabilities:
        assert row["type1"] + row["type2"] == pytest.approx(1.0)
    for bad in (["--types", "1"], ["--types", "2", "--by", "subject"], ["--method", "bayes"]):
        extra = bad if bad[0] != "--method" else ["--types", "2", *bad]
        assert cli.main([*argv[:4], *extra]) == 2
