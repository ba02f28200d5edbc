"""Shared argument declarations of the commands (stopwise/commands/_args.py)."""

from __future__ import annotations

import argparse

import pytest

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
