"""Formula strings never run code: every right-hand side passes the allow-list of
estimation/formula_guard.py before patsy sees it, on fits (library and command line) and on
predictions. The hostile cases live in tests/adversarial/formulas.tsv."""

from __future__ import annotations

import dataclasses
from collections import namedtuple
from pathlib import Path
from types import SimpleNamespace

import jax
import numpy as np
import pandas as pd
import patsy
import pytest

import stopwise  # enables float64 before jax is used
from stopwise.cli import main
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.formula_guard import check_formula_rhs, safe_namespace
from stopwise.estimation.formulas import design_for_new_rows
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

CORPUS = Path(__file__).parent / "adversarial" / "formulas.tsv"
COLUMNS = ("trial", "age", "treatment")
MODEL = "linear+myopic+logit"
LEGITIMATE = (
    "1",
    "1 + trial",
    "trial - 1 + age",
    "0 + C(treatment)",
    "1 + C(treatment) + center(age)",
    "1 + C(treatment):age",
    "1 + treatment*age",
    "1 + I(age ** 2 / 100 - 3.5e-1 * trial)",
    "1 + standardize(age) + scale(trial)",
    "1 + log(age) + exp(-trial / 10)",
    "1 + center(log(age))",
    "(age + trial) ** 2",
    "1 + (C(treatment) + age):trial",
)


def hostile_cases() -> list[tuple[str, str]]:
    """(rhs, fragment) rows of the corpus; a literal \\n stands for a newline."""
    rows = []
    for line in CORPUS.read_text(encoding="utf-8").splitlines():
        if line and not line.startswith("#"):
            rhs, fragment = line.split("\t")
            rows.append((rhs.replace("\\n", "\n"), fragment))
    return rows


def probe_formula(probe: Path) -> str:
    """The issue's probe: a term that would write ``probe`` if evaluated."""
    return f"r ~ 1 + I(__import__('pathlib').Path({str(probe)!r}).write_text('x') * 0 + trial)"


@pytest.mark.parametrize(("rhs", "fragment"), hostile_cases())
def test_each_hostile_right_hand_side_is_refused_naming_its_token(rhs, fragment) -> None:
    with pytest.raises(StopwiseInputError) as caught:
        check_formula_rhs(rhs, COLUMNS, f"r ~ {rhs}")
    assert fragment in str(caught.value)


def test_the_corpus_is_not_empty_and_every_case_is_refused() -> None:
    cases = hostile_cases()
    refused = 0
    for rhs, _ in cases:
        try:
            check_formula_rhs(rhs, COLUMNS)
        except StopwiseInputError:
            refused += 1
    assert len(cases) >= 40
    assert refused == len(cases)


@pytest.mark.parametrize("rhs", LEGITIMATE)
def test_legitimate_formulas_pass_the_allow_list_and_patsy_builds_them(rhs) -> None:
    check_formula_rhs(rhs, COLUMNS)
    frame = pd.DataFrame(
        {"trial": [1.0, 2.0, 3.0, 4.0], "age": [20.0, 30.0, 25.0, 41.0], "treatment": list("abab")}
    )
    matrix = patsy.dmatrix(rhs, frame, eval_env=patsy.EvalEnvironment([safe_namespace()]))
    assert np.all(np.isfinite(np.asarray(matrix)))


def test_patsy_with_the_safe_namespace_cannot_reach_builtins(tmp_path) -> None:
    """Second layer: even a string that skipped the allow-list finds no builtin to call."""
    probe = tmp_path / "PROBE"
    frame = pd.DataFrame({"trial": [1.0, 2.0]})
    with pytest.raises(Exception, match="builtin"):
        patsy.dmatrix(
            f"I(open({str(probe)!r}, 'w'))",
            frame,
            eval_env=patsy.EvalEnvironment([safe_namespace()]),
        )
    assert not probe.exists()


@pytest.fixture(scope="module")
def decisions(tmp_path_factory) -> tuple[pd.DataFrame, Path]:
    """Invented decisions (simulated) with an age-like covariate, as a frame and a CSV."""
    design = stopping_design(12, 10, (0.7, 0.9), 1.0, 5)
    frame = build_model(MODEL).simulate({"precision": 1.0}, design, jax.random.PRNGKey(5))
    frame["age"] = 20.0 + frame["subject"].str[1:].astype(int) % 4
    path = tmp_path_factory.mktemp("formula") / "decisions.csv"
    frame.to_csv(path, index=False)
    return frame, path


def test_the_probe_is_refused_by_the_library_fit(decisions, tmp_path) -> None:
    frame, _ = decisions
    probe = tmp_path / "PROBE"
    formula = probe_formula(probe).replace("r ~", "precision ~")
    with pytest.raises(StopwiseInputError, match="__import__"):
        stopwise.fit(MODEL, frame, formulas=[formula], se=None)
    with pytest.raises(StopwiseInputError, match="__import__"):
        stopwise.fit(MODEL, frame, formulas={"precision": formula.split("~", 1)[1]}, se=None)
    assert not probe.exists()


def test_the_probe_is_refused_by_the_command_line(decisions, tmp_path, capsys) -> None:
    _, path = decisions
    probe = tmp_path / "PROBE"
    out = tmp_path / "fit.json"
    formula = probe_formula(probe).replace("r ~", "precision ~")
    code = main(["fit", str(path), "--model", MODEL, "--formula", formula, "--json", str(out)])
    assert code == 2
    assert "__import__" in capsys.readouterr().err
    assert not probe.exists()
    assert not out.exists()


def test_the_probe_is_refused_by_predict(decisions, tmp_path) -> None:
    """A fit whose formula text was replaced by the probe refuses to predict with it."""
    frame, _ = decisions
    fit = stopwise.fit(MODEL, frame, formulas=["precision ~ 1 + age"], se=None, starts=1)
    probe = tmp_path / "PROBE"
    designs = fit.extras["designs"]
    hostile_rhs = probe_formula(probe).split("~", 1)[1]
    fit.extras["designs"] = {
        "precision": dataclasses.replace(designs["precision"], rhs=hostile_rhs)
    }
    with pytest.raises(StopwiseInputError, match="__import__"):
        fit.predict(frame)
    assert not probe.exists()


def test_predict_checks_the_stored_factor_code_too(decisions, tmp_path) -> None:
    frame, _ = decisions
    probe = tmp_path / "PROBE"
    code = f"open({str(probe)!r}, 'w')"
    factor = namedtuple("Factor", "code")
    info = SimpleNamespace(factor_infos={factor(code): None})
    formula = SimpleNamespace(
        param="precision", rhs="1 + age", variables=("age",), design_info=info
    )
    with pytest.raises(StopwiseInputError, match="'open'"):
        design_for_new_rows(formula, frame)
    assert not probe.exists()


def test_a_formula_without_terms_is_refused(decisions) -> None:
    frame, _ = decisions
    for formula in ("precision ~ 0", "precision ~ -1"):
        with pytest.raises(StopwiseInputError, match="no terms"):
            stopwise.fit(MODEL, frame, formulas=[formula], se=None)
