"""The demo scenario: reproducible, valid, the promised design, and the demo command."""

from __future__ import annotations

import json

import pandas as pd
import pytest

import stopwise.demo as demo_module
from stopwise.cli import main
from stopwise.data_schemas.validate import validate
from stopwise.demo import demo_data, demo_design

DEMO_OUTPUTS = sorted(
    [
        "stopping.csv",
        "lottery.csv",
        "compare_solo.csv",
        "compare_solo.json",
        "report.html",
        "fit_solo.json",
        "fit_lottery.json",
        "lottery.png",
        "lottery.svg",
        "fit_hier.json",
        "compare_contest.csv",
        "counterfactual.csv",
    ]
)


def test_demo_is_reproducible_and_seeded(small_demo) -> None:
    again = demo_data(n_subjects=12)
    for name in ("stopping", "lottery"):
        pd.testing.assert_frame_equal(small_demo[name], again[name])
    other = demo_data(seed=1, n_subjects=12)
    assert not small_demo["stopping"].equals(other["stopping"])


def test_demo_data_are_valid(small_demo) -> None:
    assert validate(small_demo["stopping"]).ok
    assert validate(small_demo["lottery"]).ok


def test_full_demo_design() -> None:
    design = demo_design(n_subjects=120)
    trials, items = design["stopping"], design["lottery"]
    assert "action" not in trials and "draws" not in trials and "choice" not in items
    assert trials["subject"].nunique() == 120
    assert trials.groupby("subject").size().eq(60).all()
    assert set(trials["p_survive"]) == {0.75, 0.85, 0.95}
    contest = trials[trials["task"] == "contest"]
    assert contest.groupby("group")["subject"].nunique().eq(2).all()
    assert set(zip(contest["prize"], contest["keep_bank"])) == {(10.0, 0), (5.0, 1)}
    assert {"treatment", "age"} <= set(trials.columns)
    assert items.groupby("subject").size().eq(14).all()


def test_odd_number_of_subjects_forms_one_group_of_three() -> None:
    data = demo_data(n_subjects=5)
    assert validate(data["stopping"]).ok
    contest = data["stopping"][data["stopping"]["task"] == "contest"]
    sizes = contest.groupby("group")["subject"].nunique()
    assert sorted(sizes.unique()) == [2, 3]


def check_demo_command(out, capsys) -> None:
    """Run ``stopwise demo --out OUT --subjects 12`` and check every output and heading."""
    assert main(["demo", "--out", str(out), "--subjects", "12"]) == 0
    captured = capsys.readouterr()
    printed = captured.out
    assert sorted(p.name for p in out.iterdir()) == DEMO_OUTPUTS
    assert printed.rstrip().endswith(f"Report: {(out / 'report.html').resolve()}")
    assert "FutureWarning" not in captured.err  # library chatter is not ours to show
    page = (out / "report.html").read_text()
    assert "<h2>Stopping behaviour</h2>" in page and "<h2>Contests</h2>" in page
    assert "OK (decision-level stopping data" in printed
    assert "Stopping data by condition" in printed and "Lottery choices by item" in printed
    assert "Model comparison" in printed and "Counterfactual bonus schemes" in printed
    assert validate(out / "stopping.csv").stats["subjects"] == 12
    fit = json.loads((out / "fit_solo.json").read_text())
    assert fit["model"] == "crra+planner+logit" and fit["converged"] is True
    assert [p["name"] for p in fit["params"]] == ["r", "r:treatment", "precision"]
    compared = json.loads((out / "compare_solo.json").read_text())
    assert sorted(m["model"] for m in compared["models"]) == sorted(demo_module.SOLO_SPECS)
    assert "hierarchical Bayesian crra+myopic+logit" in printed and "max R-hat" in printed
    hier = json.loads((out / "fit_hier.json").read_text())
    assert hier["method"] == "bayes" and hier["hierarchical"] is True
    assert hier["n_subjects"] == 12
    assert {"max_rhat", "min_ess_bulk", "divergences"} <= set(hier["diagnostics"])
    # thinned draws for the report's rank plots; the report draws them from the record
    assert hier["thinned_draws"]["chains"] == demo_module.HIER_CHAINS
    assert hier["thinned_draws"]["params"]
    assert "<h2>Bayesian diagnostics</h2>" in page
    assert "Time per step on this machine" in printed


def test_demo_command_writes_validates_and_describes(tmp_path, capsys, monkeypatch) -> None:
    # every step of the demo runs; the solo comparison has two of its three models, the
    # contest games are capped at 15 dives instead of 30 and the Bayesian step runs 2 chains
    # of 100 + 100 (the whole demo: the slow test below)
    monkeypatch.setattr(demo_module, "SOLO_SPECS", demo_module.SOLO_SPECS[:2])
    monkeypatch.setattr(demo_module, "CONTEST_MAX_TARGET", 15)
    monkeypatch.setattr(demo_module, "HIER_CHAINS", 2)
    monkeypatch.setattr(demo_module, "HIER_DRAWS", 100)
    monkeypatch.setattr(demo_module, "HIER_WARMUP", 100)
    check_demo_command(tmp_path / "demo", capsys)


@pytest.mark.slow
def test_whole_demo_command_at_twelve_subjects(tmp_path, capsys) -> None:
    check_demo_command(tmp_path / "demo", capsys)


def test_demo_hides_library_deprecation_banners_but_not_ours() -> None:
    import warnings

    from stopwise.commands.demo import quiet_library_warnings

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with quiet_library_warnings():
            for module in ("somelib.core", "stopwise.models.spec"):
                warnings.warn_explicit("banner", FutureWarning, f"{module}.py", 1, module=module)
    assert [w.filename for w in caught] == ["stopwise.models.spec.py"]
