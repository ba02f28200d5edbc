"""Shared argument declarations of the commands (stopwise/commands/_args.py)."""

from __future__ import annotations

import argparse

import pytest

from stopwise.cli import main
from stopwise.commands import _args, compare, fit


@pytest.mark.parametrize(
    ("given", "engine"), [(None, "auto"), ("none", None), ("robust", "robust")]
)
def test_se_option_maps_to_the_engine_choice(given: str | None, engine: str | None) -> None:
    assert _args.se_choice(given) == engine


def declared(module) -> dict[str, tuple]:
    sub = argparse.ArgumentParser().add_subparsers()
    parser = module.register(sub)
    return {
        a.dest: (a.option_strings, a.default, a.type, a.choices, a.help, a.metavar)
        for a in parser._actions
    }


def test_fit_and_compare_declare_their_shared_options_alike() -> None:
    a, b = declared(fit), declared(compare)
    for dest in ("data", "max_target", "chains", "draws", "warmup", "hierarchical"):
        assert a[dest] == b[dest], dest
    assert a["json"][4] == "write the result as JSON to FILE ('-' for stdout)"
    assert b["json"][4] == "write the comparison as JSON to FILE ('-' for stdout)"


@pytest.mark.parametrize(
    ("argv", "fragment"),
    [
        (["--starts", "0"], "--starts: expected a whole number >= 1, got 0"),
        (["--starts", "-3"], "--starts: expected a whole number >= 1, got -3"),
        (["--starts", "two"], "--starts: expected a whole number >= 1, got 'two'"),
        (["--bootstrap-reps", "0"], "--bootstrap-reps: expected a whole number >= 1, got 0"),
        (["--formula", "r ~ 0"], "right-hand side has no terms"),
    ],
)
def test_meaningless_counts_and_empty_formulas_are_usage_errors(
    tmp_path, argv, fragment, capsys
) -> None:
    """Issue 22 item 11: exit 2 with the option named, nothing written."""
    data = tmp_path / "d.csv"
    data.write_text(
        "subject,trial,step,p_survive,gain,action,outcome\n"
        "s1,1,0,0.9,1,draw,success\ns1,1,1,0.9,1,stop,\ns2,1,0,0.8,1,stop,\n",
        encoding="utf-8",
    )
    out = tmp_path / "fit.json"
    code = main(["fit", str(data), "--model", "crra+myopic+logit", *argv, "--json", str(out)])
    assert code == 2
    assert fragment in capsys.readouterr().err
    assert not out.exists()


@pytest.mark.parametrize(("text", "value"), [("1", 1), ("12", 12)])
def test_positive_int_accepts_counts(text, value) -> None:
    assert _args.positive_int(text) == value
