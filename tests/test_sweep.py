"""Sweeps of contest equilibria (stopwise.contest.sweep): warm starts against independent
cold solves, certificates on the full game, the jump measure, both payoff schemes, three
players, QRE, refusals and the command line."""

from __future__ import annotations

import itertools
import sys

import nashpy
import numpy as np
import pandas as pd
import pytest
from sweep_reference import (
    brute_three_player_payoffs,
    brute_two_player,
    symmetric_regret,
    zero_sum_value_strategy,
)

from stopwise import cli, contest
from stopwise.sweep import UncertifiedSweepError, sweep_contests
from stopwise.sweep_grid import parse_grid, total_variation
from stopwise.sweep_solvers import symmetric_lemke_howson, two_player_tables


def probs_of(table: pd.DataFrame) -> np.ndarray:
    return table[[c for c in table.columns if c.startswith("prob_")]].to_numpy(dtype=float)


@pytest.mark.parametrize(
    "setting",
    [
        dict(p=0.85, prize=1.0, keep_bank=False, cap=9),
        dict(p=0.9, prize=5.0, keep_bank=True, cap=12),
        # start 2, bust_keep 0.5: a bust after 2 draws (bank 2) ties with stopping at once
        dict(p=0.8, prize=3.0, keep_bank=True, cap=8, gain=1.0, start=2.0, bust_keep=0.5),
        dict(p=0.75, prize=2.0, keep_bank=True, cap=7, gain=1.5, r=0.4),
    ],
)
def test_cumulative_matrix_equals_brute_force(setting):
    # The O(cap^2) construction by sorted cumulative sums against the game's definition
    # written out slot by slot (tests/sweep_reference.py), on ties between bust and reach
    # banks, keep-bank and CRRA payoffs where the shortcut could go wrong.
    p, prize, kb, cap = (setting.pop(k) for k in ("p", "prize", "keep_bank", "cap"))
    ours = two_player_tables(p, prize, kb, cap, **setting)
    reference, payoff_range = brute_two_player(p, prize, kb, cap, **setting)
    assert np.max(np.abs(ours.payoff - reference)) <= 1e-12 * (1 + payoff_range)
    assert ours.payoff_range == pytest.approx(payoff_range, rel=1e-12)


def test_parse_grid_ranges_and_lists():
    grid = parse_grid("0.80:0.95:0.001", "p_survive")
    assert len(grid) == 151 and grid[0] == 0.8 and grid[-1] == 0.95
    assert grid[100] == pytest.approx(0.9, abs=1e-12)
    assert parse_grid("0.5,1,2,5,10,20", "prize") == [0.5, 1, 2, 5, 10, 20]
    assert parse_grid("0.9", "p_survive") == [0.9]


def test_total_variation_by_hand():
    # Hand computation: (|0.5 - 0| + |0.5 - 0.5| + |0 - 0.5|) / 2 = 0.5.
    assert total_variation(np.array([0.5, 0.5, 0.0]), np.array([0.0, 0.5, 0.5])) == 0.5
    assert total_variation(np.array([1.0, 0.0]), np.array([0.0, 1.0])) == 1.0


def test_winner_takes_all_warm_starts_equal_cold_lp_across_a_jump():
    # Independent cold solve at every point: scipy's LP on the zero-sum game A - prize/2
    # (winner takes all: A + A^T = prize, so the game is constant-sum; common practice, no
    # source) with A built by brute force from the definition (tests/sweep_reference.py).
    p_values = parse_grid("0.836:0.846:0.001", "p_survive")
    table = contest.sweep(p_values, 1.0, 2, max_target=40)
    sigmas = probs_of(table)
    assert table["certified"].all()
    for p, sigma in zip(p_values, sigmas):
        a, payoff_range = brute_two_player(p, 1.0, False, 40)
        cold = zero_sum_value_strategy(a - 0.5)
        assert np.max(np.abs(sigma - cold)) <= 1e-7
        assert symmetric_regret(a, sigma) <= 1e-9 * payoff_range
    jump = int(table["tv_prev"].idxmax())
    assert table.loc[jump, "tv_prev"] > 0.5  # the support moves here (about p = 0.841)
    assert table.loc[jump, "method"].startswith("warm")  # ... and the warm start follows it
    assert table["method"].str.startswith("warm").sum() == len(table) - 1


def test_tv_column_equals_recomputation_from_the_table():
    table = contest.sweep([0.8, 0.82, 0.84, 0.86], 1.0, 2, max_target=30)
    sigmas = probs_of(table)
    assert np.isnan(table["tv_prev"].iloc[0])
    by_hand = 0.5 * np.abs(np.diff(sigmas, axis=0)).sum(axis=1)
    assert np.allclose(table["tv_prev"].iloc[1:].to_numpy(), by_hand, atol=1e-15)


def test_keep_bank_sweep_over_prizes_changes_with_the_prize():
    # The full, unreduced keep-bank matrix (brute force) and nashpy (Knight & Campbell
    # 2018) as outside references: no pure deviation gains more than 1e-9 of the payoff
    # range, by our regret and by nashpy's payoff evaluation, and the answer
    # moves with the prize (a reduction that drops one's own-bank term would not).
    prizes = [0.5, 1.0, 5.0, 10.0, 100.0]
    table = contest.sweep(0.9, prizes, 2, keep_bank=True, max_target=30)
    sigmas = probs_of(table)
    assert table["certified"].all()
    for prize, sigma in zip(prizes, sigmas):
        a, payoff_range = brute_two_player(0.9, prize, True, 30)
        assert symmetric_regret(a, sigma) <= 1e-9 * payoff_range
        reference = nashpy.Game(a, a.T)  # payoffs of (sigma, sigma) and of pure deviations
        value = reference[sigma, sigma][0]
        deviations = [reference[pure, sigma][0] for pure in np.eye(31)]
        assert max(deviations) - value <= 1e-9 * payoff_range
    assert (table["tv_prev"].iloc[1:] > 0.05).all()
    # prize 1: nashpy's support enumeration on targets 8..12, extended by zeros, is an
    # equilibrium of the full game and equals ours.
    a, payoff_range = brute_two_player(0.9, 1.0, True, 30)
    block = a[8:13, 8:13]
    found = []
    for x, y in nashpy.Game(block, block.T).support_enumeration():
        full = np.zeros(31)
        full[8:13] = x
        if np.allclose(x, y) and symmetric_regret(a, full) <= 1e-9 * payoff_range:
            found.append(full)
    assert len(found) == 1
    assert np.max(np.abs(sigmas[1] - found[0])) <= 1e-9


@pytest.mark.parametrize("keep_bank", [False, True])
def test_three_players_certified_by_brute_force(keep_bank):
    # Three players: the regret of each row recomputed by enumerating slot triples
    # (tests/sweep_reference.py, independent of the solvers' win-probability formula), and
    # each warm-started row equal to a cold solve of stopwise.contest.equilibrium.
    p_values = [0.8, 0.81, 0.82]
    table = contest.sweep(p_values, 2.0, 3, keep_bank=keep_bank, max_target=8)
    assert table["certified"].all()
    assert table["method"].iloc[1:].str.startswith("warm").all()
    for p, sigma in zip(p_values, probs_of(table)):
        u, payoff_range = brute_three_player_payoffs(p, 2.0, keep_bank, 8, sigma)
        assert u.max() - sigma @ u <= 1e-8 * payoff_range
        cold = contest.equilibrium(p, 3, 2.0, keep_bank=keep_bank, max_target=8)
        assert np.max(np.abs(sigma - np.asarray(cold["probs"]))) <= 1e-6


def test_qre_sweep_is_a_fixed_point_and_matches_cold_solves():
    # Logit QRE (McKelvey & Palfrey 1995): sigma = softmax(lambda * A sigma), A by brute
    # force; each warm-started row equals the cold solve at the same cap.
    p_values = [0.85, 0.86, 0.87]
    table = contest.sweep(p_values, 1.0, 2, concept="qre", precision=2.0, max_target=20)
    assert table["certified"].all() and (table["check"] == "fixed-point residual").all()
    for p, sigma in zip(p_values, probs_of(table)):
        a, _ = brute_two_player(p, 1.0, False, 20)
        z = 2.0 * (a @ sigma)
        response = np.exp(z - z.max()) / np.exp(z - z.max()).sum()
        assert np.max(np.abs(sigma - response)) <= 1e-9
        cold = contest.equilibrium(p, 2, 1.0, concept="qre", precision=2.0, max_target=20)
        assert np.max(np.abs(sigma - np.asarray(cold["probs"]))) <= 1e-8


def _uniform_solver(**options):
    cap = options["max_target"]
    return {"probs": [1.0 / (cap + 1)] * (cap + 1), "method": "a deliberately wrong answer"}


def test_uncertified_points_are_refused_or_marked():
    with pytest.raises(UncertifiedSweepError, match="failed their certificate"):
        sweep_contests(0.9, 1.0, 2, _uniform_solver, concept="qre", precision=3.0, max_target=15)
    table = sweep_contests(
        0.9,
        1.0,
        2,
        _uniform_solver,
        concept="qre",
        precision=3.0,
        max_target=15,
        allow_approximate=True,
    )
    assert not table["certified"].any() and table["residual"].iloc[0] > 1e-3


# ----------------------------------------------------------------------------- command line


def test_cli_round_trip(tmp_path, capsys):
    out, figure, as_json = tmp_path / "t.csv", tmp_path / "f.png", tmp_path / "t.json"
    args = ["sweep", "--p-survive", "0.80:0.82:0.01", "--prize", "1,5", "--players", "2"]
    args += ["--keep-bank", "--max-target", "25", "--quiet"]
    assert cli.main([*args, "--out", str(out), "--figure", str(figure)]) == 0
    assert cli.main([*args, "--out", str(as_json)]) == 0
    assert "Traceback" not in capsys.readouterr().err  # and no progress bar off a TTY
    written = pd.read_csv(out)
    direct = contest.sweep([0.8, 0.81, 0.82], [1.0, 5.0], 2, keep_bank=True, max_target=25)
    assert len(written) == 6 and written["certified"].all()
    assert np.allclose(probs_of(written), probs_of(direct), atol=1e-12)
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert '"axis": "p_survive"' in as_json.read_text()
    assert not list(tmp_path.glob(".*.tmp"))


@pytest.mark.parametrize(
    ("option", "value", "expected"),
    [
        ("--p-survive", "0.8:0.7:0.01", "LO <= HI"),
        ("--p-survive", "0.8:0.9", "LO:HI:STEP"),
        ("--p-survive", "0.8:0.9:0", "STEP > 0"),
        ("--p-survive", "0.8,x", "not a number"),
        ("--p-survive", "0.5:1.0:0.1", "strictly between 0 and 1"),
        ("--prize", "1,-2", "prize must be positive"),
        ("--out", "t.xlsx", "expected a file ending"),
    ],
)
def test_cli_bad_input_exits_2_and_writes_nothing(tmp_path, capsys, option, value, expected):
    out = tmp_path / "t.csv"
    args = {"--p-survive": "0.8,0.9", "--prize": "1", "--out": str(out)}
    args[option] = str(tmp_path / value) if option == "--out" else value
    argv = ["sweep", "--players", "2", "--quiet", *itertools.chain(*args.items())]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err
    assert expected in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_cli_uncertified_exits_1_unless_approximations_allowed(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(contest, "equilibrium", _uniform_solver)
    out = tmp_path / "t.csv"
    argv = ["sweep", "--p-survive", "0.9", "--players", "2", "--concept", "qre"]
    argv += ["--precision", "3", "--max-target", "15", "--quiet", "--out", str(out)]
    assert cli.main(argv) == 1
    assert "failed their certificate" in capsys.readouterr().err
    assert not out.exists()
    assert cli.main([*argv, "--allow-approximate"]) == 0
    assert not pd.read_csv(out)["certified"].any()


@pytest.mark.parametrize(
    ("concept", "options"),
    [("levelk", {"precision": 2.0, "level": 2}), ("ch", {"precision": 2.0, "tau": 1.5})],
)
def test_levelk_and_ch_rows_equal_the_single_point_answer(concept, options):
    # Exact by construction: each row equals stopwise.contest.equilibrium at the same cap.
    table = contest.sweep([0.8, 0.85], 1.0, 2, concept=concept, max_target=10, **options)
    assert table["certified"].all() and table["check"].str.startswith("exact").all()
    for p, sigma in zip([0.8, 0.85], probs_of(table)):
        single = contest.equilibrium(p, 2, 1.0, concept=concept, max_target=10, **options)
        assert np.max(np.abs(sigma - np.asarray(single["probs"]))) <= 1e-10


def test_progress_bar_only_on_a_terminal(capsys, monkeypatch):
    argv = ["sweep", "--p-survive", "0.8,0.81,0.82", "--players", "2", "--max-target", "12"]
    assert cli.main(argv) == 0
    assert "3/3" not in capsys.readouterr().err  # captured stderr is not a terminal
    monkeypatch.setattr(type(sys.stderr), "isatty", lambda self: True, raising=False)
    assert cli.main(argv) == 0
    assert "3/3" in capsys.readouterr().err
    assert cli.main([*argv, "--quiet"]) == 0
    assert "3/3" not in capsys.readouterr().err


@pytest.mark.parametrize(
    ("extra", "expected"),
    [
        (["--players", "1"], "players must be an integer >= 2"),
        (["--players", "2", "--concept", "qre"], "needs precision"),
        (["--players", "2", "--r", "1.5"], "r must be below 1"),
        (["--players", "2", "--max-target", "0"], "max_target must be an integer >= 1"),
        (["--players", "2", "--gain", "0"], "expected gain > 0"),
        (["--players", "2", "--tolerance", "0"], "tolerance must be positive"),
    ],
)
def test_cli_bad_options_exit_2(tmp_path, capsys, extra, expected):
    out = tmp_path / "t.csv"
    assert cli.main(["sweep", "--p-survive", "0.9", "--out", str(out), *extra]) == 2
    assert expected in capsys.readouterr().err
    assert not out.exists()


@pytest.mark.filterwarnings("ignore::RuntimeWarning")  # nashpy's note on degenerate games
@pytest.mark.parametrize("seed", range(4))
def test_symmetric_lemke_howson_is_among_nashpy_equilibria(seed):
    # Outside reference: nashpy's (Knight & Campbell 2018) support enumeration on random
    # symmetric games (B = A^T); our symmetric equilibrium must be one of its equilibria.
    a = np.random.default_rng(seed).normal(size=(5, 5))
    sigma = symmetric_lemke_howson(a)
    reference = list(nashpy.Game(a, a.T).support_enumeration())
    assert any(
        np.allclose(sigma, x, atol=1e-9) and np.allclose(sigma, y, atol=1e-9) for x, y in reference
    )


def test_rescue_when_the_cold_solver_is_wrong():
    # A cold answer that fails its certificate is replaced by a certified one from the
    # rescue solvers, checked on the brute-force matrix.
    table = sweep_contests([0.85, 0.86], 1.0, 2, _uniform_solver, max_target=20)
    assert table["certified"].all()
    assert table["method"].iloc[0].startswith("rescue")
    for p, sigma in zip([0.85, 0.86], probs_of(table)):
        a, payoff_range = brute_two_player(p, 1.0, False, 20)
        assert symmetric_regret(a, sigma) <= 1e-9 * payoff_range
