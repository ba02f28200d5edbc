"""Every contest answer carries its check: certificates, refusals, limits, the cap as part
of the model, notes that are true for the concept, and the efficiency loss."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise import cli
from stopwise.contest import (
    UncertifiedAnswer,
    counterfactual,
    equilibrium,
    format_equilibrium,
)
from stopwise.data_schemas.errors import StopwiseInputError


@pytest.mark.parametrize("keep_bank", [False, True])
@pytest.mark.parametrize(("players", "cap"), [(2, None), (3, 12)])
@pytest.mark.parametrize("p", [0.8, 0.9])
@pytest.mark.parametrize("prize", [1.0, 10.0])
def test_dominated_targets_never_carry_mass(keep_bank, players, cap, p, prize):
    # Invariant: a strictly dominated target is never a best response, so no Nash
    # equilibrium puts mass on it (definition of strict dominance; common practice, no
    # source). Checked on a grid with the dominance analysis actually run (3 players at a
    # cap that keeps the opponent profiles enumerable).
    result = equilibrium(p, players, prize, keep_bank=keep_bank, max_target=cap)
    assert result["certified"]
    assert not any("not checked" in n for n in result["notes"])
    probs = np.array(result["probs"])
    assert probs[result["dominated"]].sum() <= 1e-12
    assert result["dominated_mass"] <= 1e-12


def test_solo_optimum_and_efficiency_loss_by_independent_computation():
    # Efficiency loss = 1 - E[bank] / best solo risk-neutral E[bank]. With gain 1, start 0,
    # E[bank | t] = t p^t, maximised at t* = floor or ceil of -1/ln p (calculus; common
    # practice, no source), computed here without the package.
    for p, prize, keep in ((0.9, 1.0, True), (0.9, 100.0, True), (0.85, 10.0, False)):
        result = equilibrium(p, 2, prize, keep_bank=keep)
        sigma = np.array(result["probs"])
        t = np.arange(len(sigma))
        star = -1.0 / math.log(p)
        best = max(k * p**k for k in (math.floor(star), math.ceil(star)))
        bank = float(sigma @ (t * p**t))
        assert result["expected_bank"] == pytest.approx(bank, abs=1e-12)
        assert result["efficiency_loss"] == pytest.approx(1.0 - bank / best, abs=1e-12)
        assert "solo" in result["efficiency_loss_definition"]


def test_uncertified_answer_is_refused_unless_approximations_are_asked_for():
    # A QRE held to a residual tolerance below what float64 Newton reaches (1e-300) fails its
    # certificate genuinely: refused by default, returned marked with allow_approximate.
    with pytest.raises(UncertifiedAnswer, match="qre solver"):
        equilibrium(0.8, 2, 10.0, concept="qre", precision=2.0, max_target=8, tolerance=1e-300)
    approx = equilibrium(
        0.8,
        2,
        10.0,
        concept="qre",
        precision=2.0,
        max_target=8,
        tolerance=1e-300,
        allow_approximate=True,
    )
    assert approx["certified"] is False
    assert approx["notes"][0].startswith("APPROXIMATE, NOT CERTIFIED")
    assert "NOT CERTIFIED" in format_equilibrium(approx)


def test_command_exits_1_naming_the_solver_and_what_to_try(tmp_path, capsys):
    out = tmp_path / "eq.json"
    args = [
        "equilibrium",
        "--p-survive",
        "0.8",
        "--players",
        "2",
        "--prize",
        "10",
        "--concept",
        "qre",
        "--precision",
        "2",
        "--max-target",
        "8",
    ]
    assert cli.main([*args, "--tolerance", "1e-300", "--json", str(out)]) == 1
    err = capsys.readouterr().err
    assert "qre solver" in err and "--allow-approximate" in err and not out.exists()
    assert (
        cli.main([*args, "--tolerance", "1e-300", "--allow-approximate", "--json", str(out)]) == 0
    )
    assert json.loads(out.read_text())["certified"] is False


def test_qre_certificate_is_its_fixed_point_residual():
    result = equilibrium(0.85, 2, 10.0, concept="qre", precision=2.0, max_target=20)
    assert result["certificate"]["kind"] == "fixed-point residual"
    assert result["certificate"]["value"] <= 1e-6 and result["certified"]
    levelk = equilibrium(0.85, 2, 10.0, concept="levelk", precision=2.0, level=2, max_target=20)
    assert levelk["certificate"]["kind"] == "exact by construction" and levelk["certified"]


def test_high_precision_qre_converges_towards_nash():
    # Issue 22 item 4: at precision 1e4 the old solver diverged (output summing to 1.8-4,
    # bust rate 0.943). The logit QRE branch tends to a Nash equilibrium as precision grows
    # (McKelvey & Palfrey 1995, from memory): close to the Nash answer, certified by its
    # residual, and far from uniform play.
    kwargs = {"max_target": 30}
    nash = equilibrium(0.85, 2, 10.0, **kwargs)
    qre = equilibrium(0.85, 2, 10.0, concept="qre", precision=1e4, **kwargs)
    assert qre["certified"] and sum(qre["probs"]) == pytest.approx(1.0, abs=1e-12)
    assert 0.5 * np.abs(np.array(qre["probs"]) - nash["probs"]).sum() < 0.01
    assert qre["max_regret_share"] < 1e-4
    assert qre["bust_rate"] == pytest.approx(nash["bust_rate"], abs=0.01)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"precision": math.inf, "concept": "qre"}, "finite"),
        ({"precision": 1e300, "concept": "qre"}, "limit"),
        ({"precision": 2.0}, "not used by nash"),
        ({"players": 100}, "at most 20"),
        ({"prize": math.inf}, "finite"),
        ({"tau": 1e6, "precision": 1.0, "concept": "ch"}, "tau"),
    ],
)
def test_limits_and_unused_parameters_are_refused(kwargs, message):
    base = {"p_survive": 0.8, "players": 2, "prize": 10.0, "max_target": 8}
    with pytest.raises(StopwiseInputError, match=message):
        equilibrium(**{**base, **kwargs})


@pytest.mark.parametrize(
    "extra",
    [
        ["--players", "100", "--prize", "10"],
        ["--players", "2", "--prize", "inf"],
        ["--players", "2", "--prize", "10", "--concept", "ch", "--precision", "1", "--tau", "1e6"],
        ["--players", "2", "--prize", "10", "--precision", "3"],
    ],
)
def test_command_refuses_limits_with_exit_2(extra, tmp_path, capsys):
    out = tmp_path / "eq.json"
    assert cli.main(["equilibrium", "--p-survive", "0.8", *extra, "--json", str(out)]) == 2
    assert "error:" in capsys.readouterr().err and not out.exists()


def test_notes_are_true_for_the_concept():
    # Winner-take-all: Nash is unchanged by r (u is affine on {0, prize}); logit play is not,
    # since r rescales u(prize) - u(0) (logit choice; common practice, no source).
    nash_a = equilibrium(0.8, 2, 10.0, r=0.4, max_target=10)
    nash_b = equilibrium(0.8, 2, 10.0, max_target=10)
    assert np.allclose(nash_a["probs"], nash_b["probs"], atol=1e-9)
    assert any("does not change the Nash" in n for n in nash_a["notes"])
    qre_a = equilibrium(0.8, 2, 10.0, r=0.4, concept="qre", precision=1.0, max_target=10)
    qre_b = equilibrium(0.8, 2, 10.0, concept="qre", precision=1.0, max_target=10)
    assert not np.allclose(qre_a["probs"], qre_b["probs"], atol=1e-3)
    assert not any("does not change" in n for n in qre_a["notes"])
    assert any("payoff scale" in n for n in qre_a["notes"])


def test_mass_on_dominated_targets_warns_and_the_table_counts_hidden_rows():
    # Issue 11 item 4: QRE at precision 2 spreads mass over targets the same output lists as
    # strictly dominated; above 1% this is warned about.
    with pytest.warns(UserWarning, match="strictly dominated"):
        result = equilibrium(0.85, 2, 10.0, concept="qre", precision=2.0, max_target=40)
    assert result["dominated_mass"] > 0.01
    text = format_equilibrium(result, min_prob=1e-2)
    hidden = sum(1 for q in result["probs"] if q < 1e-2)
    assert hidden > 0 and f"({hidden} targets with probability below 0.01 not shown" in text


def test_counterfactual_uses_the_fits_cap_unless_a_scheme_overrides_it():
    fit = {"model": "linear+qre", "params": {"precision": 1.0}, "max_target": 9}
    schemes = [
        {"name": "fit cap", "p_survive": 0.8, "players": 2, "prize": 10.0},
        {"name": "own cap", "p_survive": 0.8, "players": 2, "prize": 10.0, "max_target": 5},
    ]
    table = counterfactual(fit, schemes).table
    by_scheme = table.groupby("scheme")
    assert set(by_scheme.get_group("fit cap")["cap"]) == {9}
    assert set(by_scheme.get_group("fit cap")["cap_source"]) == {"fit"}
    assert set(by_scheme.get_group("own cap")["cap"]) == {5}
    assert table["certified"].all()
    assert set(table["check"]) == {"max regret", "fixed-point residual"}
