"""Paper tables (estimation/tables.py; ``--table`` of fit and compare): several models side
by side, estimates with their SEs beneath in parentheses and n, log-likelihood, AIC, BIC at
the foot (the layout of economics papers: common practice, no source)."""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest

from stopwise import cli
from stopwise.estimation import tables
from stopwise.saved import SavedFit


def _saved(model, params, **foot):
    record = {"model": model, "params": params, **foot}
    return SavedFit(record, f"{model}.json")


@pytest.fixture
def two_fits():
    """Two results as read from JSON; the numbers only exercise the layout."""
    first = _saved(
        "pt+tk+target+logit",
        [
            {
                "name": "loss_aversion",
                "estimate": 1.98765,
                "se": 0.1234,
                "ci_low": 1.7,
                "ci_high": 2.2,
            },
            {"name": "precision", "estimate": 3.5, "se": None, "ci_low": None, "ci_high": None},
        ],
        n_obs=1000,
        n_subjects=40,
        loglik=-512.345,
        aic=1028.69,
        bic=1038.5,
    )
    second = _saved(
        "crra+planner+logit",
        [{"name": "precision", "estimate": 2.0, "se": 0.00012, "ci_low": 1.9, "ci_high": 2.1}],
        n_obs=1000,
        n_subjects=40,
        loglik=-530.0,
        aic=1064.0,
        bic=1068.9,
    )
    return [first, second]


def test_side_by_side_places_each_estimate_and_blanks_what_a_model_lacks(two_fits):
    table = tables.side_by_side(two_fits)
    assert list(table.columns) == ["(1) pt+tk+target+logit", "(2) crra+planner+logit"]
    assert table.loc["loss_aversion"].tolist() == ["1.988", ""]
    assert table.loc["loss_aversion SE"].tolist() == ["(0.123)", ""]
    assert table.loc["precision SE"].tolist() == ["(-)", "(0.000120)"]  # missing SE; 3 sig. digits
    assert table.loc["AIC"].tolist() == ["1028.69", "1064.00"]
    assert table.loc["Observations"].tolist() == ["1000", "1000"]


def test_latex_rows_are_complete_and_names_escaped(two_fits):
    text = tables.to_latex(two_fits, interval="ci")
    body = [ln for ln in text.splitlines() if ln.endswith(r"\\")]
    assert all(ln.count("&") == 2 for ln in body)  # label + 2 model columns on every row
    assert r"loss\_aversion" in text and "loss_aversion" not in text.replace(r"loss\_aversion", "")
    assert "[1.700, 2.200]" in text
    assert text.count(r"\midrule") == 2 and r"\bottomrule" in text


def test_markdown_and_csv_carry_the_same_cells(two_fits):
    markdown = tables.to_markdown(two_fits)
    lines = [ln for ln in markdown.splitlines() if ln.startswith("|")]
    assert all(ln.count("|") == 4 for ln in lines)
    frame = pd.read_csv(
        io.StringIO(tables.to_csv(two_fits)), index_col="row", dtype=str, keep_default_na=False
    )
    pd.testing.assert_frame_equal(frame, tables.side_by_side(two_fits).rename_axis("row"))


def test_fit_command_writes_the_table_of_its_json(small_demo, tmp_path, capsys):
    data = tmp_path / "dives.csv"
    small_demo["stopping"].to_csv(data, index=False)
    out_json, out_md = tmp_path / "fit.json", tmp_path / "fit.md"
    argv = [
        "fit",
        str(data),
        "--model",
        "crra+myopic+logit",
        "--json",
        str(out_json),
        "--table",
        str(out_md),
        "--no-progress",
    ]
    assert cli.main(argv) == 0
    record = json.loads(out_json.read_text())
    text = out_md.read_text()
    for param in record["params"]:
        assert f"| {param['name']} | {tables.number(param['estimate'])} |" in text
        assert f"| | ({tables.number(param['se'])}) |".replace("| |", "|  |") in text
    assert f"| AIC | {record['aic']:.2f} |" in text
    assert np.isfinite(record["aic"])


def test_unknown_table_ending_is_refused_before_fitting(small_demo, tmp_path, capsys):
    data = tmp_path / "dives.csv"
    small_demo["stopping"].to_csv(data, index=False)
    out = tmp_path / "fit.docx"
    code = cli.main(["fit", str(data), "--model", "crra+myopic+logit", "--table", str(out)])
    assert code == 2
    assert ".tex, .md, .csv" in capsys.readouterr().err
    assert not out.exists()


@pytest.mark.slow
def test_compare_command_puts_the_models_side_by_side(small_demo, tmp_path):
    data = tmp_path / "dives.csv"
    small_demo["stopping"].to_csv(data, index=False)
    out_json, out_tex = tmp_path / "cmp.json", tmp_path / "cmp.tex"
    argv = [
        "compare",
        str(data),
        "--model",
        "crra+myopic+logit",
        "--model",
        "crra+target+logit",
        "--cv-folds",
        "0",
        "--json",
        str(out_json),
        "--table",
        str(out_tex),
        "--table-interval",
        "ci",
    ]
    assert cli.main(argv) == 0
    fits = json.loads(out_json.read_text())["fits"]
    header = next(ln for ln in out_tex.read_text().splitlines() if ln.startswith(" & ("))
    assert header == r" & (1) crra+myopic+logit & (2) crra+target+logit \\"
    for column, fit in enumerate(fits):
        r = next(p for p in fit["params"] if p["name"] == "r")
        row = next(ln for ln in out_tex.read_text().splitlines() if ln.startswith("r & "))
        assert row.split(" & ")[column + 1].rstrip(" \\") == tables.number(r["estimate"])


def test_the_command_line_knows_the_endings_the_renderer_writes() -> None:
    """commands/_table.py keeps its own copy so the parser imports no estimation module."""
    from stopwise.commands import _table
    from stopwise.estimation import tables

    assert _table.TABLE_SUFFIXES == tables.TABLE_SUFFIXES
