"""``stopwise design`` and ``stopwise.design``: outputs, refusals of bad input, and the
search over survival chances against a direct computation of every set."""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pytest

import stopwise
from stopwise import cli
from stopwise.estimation import design_info as D
from stopwise.estimation import design_search as Q
from stopwise.estimation import design_study as S

BASE = ["design", "--model", "crra+myopic+logit", "--set", "r=0.4", "--set", "precision=2"]
SMALL = ["--p-survive", "0.6,0.8", "--trials", "20", "--subjects", "50"]


def test_design_writes_certified_json_and_a_png(tmp_path: Path, capsys) -> None:
    """The command prints the table, writes JSON whose SEs are those of stopwise.design
    and a PNG figure."""
    out, figure = tmp_path / "design.json", tmp_path / "se.png"
    argv = [*BASE, *SMALL, "--range", "r=0.2:0.6", "--json", str(out), "--figure", str(figure)]
    assert cli.main(argv) == 0
    assert "Expected precision" in capsys.readouterr().out
    written = json.loads(out.read_text())
    assert written["certified"] is True and written["range_points"] == 5
    direct = stopwise.design(
        "crra+myopic+logit",
        {"r": 0.4, "precision": 2},
        p_survive=(0.6, 0.8),
        trials=20,
        subjects=50,
        ranges={"r": (0.2, 0.6)},
    )
    table = direct.se_table()
    for row in written["params"]:
        assert row["se_50_subjects"] == pytest.approx(table.loc[row["parameter"], "se_50_subjects"])
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize(
    "extra",
    [
        ["--range", "r=0.7:0.1"],
        ["--range", "r"],
        ["--set", "nosuch=1"],
        ["--p-survive", "0.6,1.2"],
        ["--optimise", "p_survive", "--candidates", "0.5:1.2:0.1"],
        ["--optimise", "p_survive", "--criterion", "se:nosuch"],
        ["--figure", "picture.svg"],
    ],
)
def test_bad_input_exits_2_and_writes_nothing(extra: list[str], tmp_path: Path, capsys) -> None:
    out = tmp_path / "design.json"
    argv = [*BASE, *SMALL, *extra, "--json", str(out)]
    argv = [a if a != "picture.svg" else str(tmp_path / a) for a in argv]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.strip()
    assert list(tmp_path.iterdir()) == []


def test_search_matches_direct_computation_of_every_set() -> None:
    """Guards the shortcut I(S) = sum_j n_j I_(c_j) (per-candidate information reused for
    every set): each set's criterion, ranking and gain equal expected_precision run afresh
    on that set as a plan; and the best set is no worse than the baseline."""
    model = stopwise.model("crra+myopic+logit")
    theta = {"r": 0.4, "precision": 2.0}
    baseline = S.Plan(p_survive=(0.6, 0.8), trials=21, subjects=50)
    candidates = [0.5, 0.6, 0.7, 0.8, 0.9]
    found = Q.search_designs(model, theta, baseline, candidates, 2, "se:r", best=10)
    direct = {}
    for pair in itertools.combinations(candidates, 2):
        plan = S.Plan(p_survive=pair, trials=21, subjects=50)
        se = S.expected_precision(model, theta, plan).se_table().loc["r", "se_50_subjects"]
        direct[" ".join(f"{p:g}" for p in pair)] = se
    assert len(found.table) == len(direct)
    for _, row in found.table.iterrows():
        assert row["criterion"] == pytest.approx(direct[row["p_survive"]], rel=1e-9)
    assert found.table["p_survive"].iloc[0] == min(direct, key=direct.get)
    base_se = S.expected_precision(model, theta, baseline).se_table().loc["r", "se_50_subjects"]
    assert found.baseline["criterion"] == pytest.approx(base_se, rel=1e-9)
    best = found.table.iloc[0]
    assert best["se_gain"] == pytest.approx(base_se / best["criterion"])
    assert best["se_gain"] >= 1


def test_payout_budget_drops_costly_sets() -> None:
    """Expected payout per set is the sum of its trials' expected banks (checked against a
    direct sum over stop steps), and a budget below the costliest set removes it."""
    model = stopwise.model("crra+myopic+logit")
    theta = {"r": 0.4, "precision": 2.0}
    baseline = S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=50)
    tables = D.path_tables(model, [theta], (0.9,))
    stop = np.exp(tables.log_reach + tables.log_stop)[0, 0]
    by_hand = float(np.sum(stop * np.arange(stop.size)))
    payout = Q.expected_payout_per_trial(tables, 1.0, 0.0)[0, 0]
    assert payout == pytest.approx(by_hand)
    free = Q.search_designs(model, theta, baseline, [0.6, 0.9], 1, "d", best=2)
    assert len(free.table) == 2
    capped = Q.search_designs(
        model, theta, baseline, [0.6, 0.9], 1, "d", max_payout=20 * payout - 1
    )
    assert capped.dropped_budget == 1 and list(capped.table["p_survive"]) == ["0.6"]
