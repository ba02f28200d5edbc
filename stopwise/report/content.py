"""What a report says, independent of its format: sections of text, tables and figures.

``build_content`` reads the data once, turns every result (a JSON file or an object with
``to_dict``) into a saved result (stopwise.saved), and asks each part of the report for its
blocks; anything that cannot be drawn is named in the warnings, never silently left out.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from stopwise.bayes_draws import result_record
from stopwise.data_schemas.load import load
from stopwise.describe import describe
from stopwise.estimation.ml.results import DISCLAIMER
from stopwise.estimation.tables import side_by_side
from stopwise.figures.comparison import comparison_figure
from stopwise.report.blocks import Block, Inputs, Section, figure_block
from stopwise.report.figure_sections import figure_sections
from stopwise.report.record import reproducibility_record
from stopwise.saved import SavedCollection, SavedFit, load_result, result_from_record


@dataclass
class ReportContent:
    title: str
    sections: list[Section]
    record: dict[str, Any]
    warnings: list[str]
    disclaimer: str = DISCLAIMER


def result_label(item: Any, index: int) -> str:
    """How the report names a result object: its model, or the models it compares."""
    fits = getattr(item, "fits", None)
    if isinstance(fits, list) and fits:
        return "the comparison of " + ", ".join(str(f.model) for f in fits)
    model = getattr(item, "model", None)
    name = getattr(model, "name", model)
    return f"the fit of {name}" if name else f"result {index + 1}"


def read_inputs(data: Any, results: Sequence[Any]) -> Inputs:
    """Load the data file or frame and every result (paths are loaded with load_result)."""
    files: list[str] = []
    dataset = None
    if data is not None:
        dataset = load(data)
        if isinstance(data, (str, os.PathLike)):
            files.append(os.fspath(data))
    loaded = []
    for i, item in enumerate(results):
        if isinstance(item, (str, os.PathLike)):
            files.append(os.fspath(item))
            loaded.append((Path(item).name, load_result(item), None))
        else:
            label = result_label(item, i)
            loaded.append((label, result_from_record(result_record(item), label), item))
    return Inputs(dataset, loaded, files)


def single_fits(inputs: Inputs) -> list[SavedFit]:
    return [saved for _, saved, _ in inputs.results if isinstance(saved, SavedFit)]


def all_model_fits(inputs: Inputs) -> list[SavedFit]:
    """Single fits and the fits inside comparisons, first of each model name."""
    seen: dict[str, SavedFit] = {}
    for _, saved, _ in inputs.results:
        fits = [saved] if isinstance(saved, SavedFit) else saved.fits
        for fit in fits:
            seen.setdefault(fit.model, fit)
    return list(seen.values())


def data_section(inputs: Inputs) -> Section | None:
    if inputs.data is None:
        return None
    description = describe(inputs.data)
    frame = inputs.data.frame
    blocks = [
        Block(
            "text",
            text=f"{inputs.data.source}: {len(frame)} rows, {inputs.data.n_subjects} subjects, "
            f"{inputs.data.kind} data.",
        ),
        Block("table", table=conditions_table(description.table)),
    ]
    if description.notes:
        blocks.append(Block("list", items=list(description.notes)))
    return Section("Data", blocks)


def paper_layout(table: pd.DataFrame) -> pd.DataFrame:
    """The side-by-side table with the SE lines unlabelled, as printed in papers."""
    labels = ["" if str(i).endswith((" SE", " 95% CI")) else str(i) for i in table.index]
    return table.set_axis(labels, axis=0)


def conditions_table(table: pd.DataFrame) -> pd.DataFrame:
    """The describe table, transposed when it has few rows (one column per condition)."""
    if len(table) > 8:
        return table.reset_index(drop=True)
    shown = table.reset_index(drop=True).T
    shown.columns = [f"condition {i + 1}" for i in range(len(table))]
    return shown.astype(object)


def fits_section(inputs: Inputs) -> Section | None:
    fits = single_fits(inputs)
    if not fits:
        return None
    blocks = [
        Block(
            "text",
            text="Estimates, standard errors in parentheses beneath; one column per fit.",
        ),
        Block("table", table=paper_layout(side_by_side(fits))),
    ]
    for fit in fits:
        record = fit.record
        status = "converged" if record.get("converged") else "NOT converged"
        line = f"{fit.model} ({fit.method}, SE: {record.get('se_method') or 'none'}): {status}."
        notes = [line, *(f"Note: {n}" for n in record.get("notes", []))]
        blocks.append(Block("list", items=notes))
    return Section("Fits", blocks)


def comparison_blocks(label: str, saved: SavedCollection) -> list[Block]:
    table = saved.table
    blocks = [Block("text", text=f"From {label}."), Block("table", table=table)]
    if "delta_aic" in table:
        fig = comparison_figure(table, "delta_aic", "delta_aic_se")
    elif "elpd_diff" in table:
        fig = comparison_figure(table, "elpd_diff", "dse")
    else:
        return blocks
    blocks.append(figure_block(fig, f"comparison_{len(blocks)}", "Difference to the best model."))
    tests = saved.record.get("tests")
    if tests:
        blocks.append(Block("table", table=pd.DataFrame(tests)))
    blocks.append(Block("list", items=[f"Note: {n}" for n in saved.record.get("notes", [])]))
    return blocks


def comparison_section(inputs: Inputs) -> Section | None:
    blocks = []
    for label, saved, _ in inputs.results:
        if isinstance(saved, SavedCollection) and saved.kind == "comparison":
            blocks += comparison_blocks(label, saved)
    return Section("Model comparison", blocks) if blocks else None


def collect_warnings(inputs: Inputs) -> list[str]:
    """Every result's warnings, prefixed by its model."""
    out = []
    for label, saved, _ in inputs.results:
        records = [saved.record] + [f.record for f in getattr(saved, "fits", [])]
        for record in records:
            for warning in record.get("warnings", []):
                out.append(f"{record.get('model', label)}: {warning}")
    return list(dict.fromkeys(out))


def build_content(
    data: Any = None,
    results: Sequence[Any] = (),
    *,
    title: str = "stopwise report",
    argv: Sequence[str] | None = None,
    call: str | None = None,
) -> ReportContent:
    """The report's sections from the data and results (module docstring)."""
    inputs = read_inputs(data, results)
    warnings = collect_warnings(inputs)
    sections = [
        s for s in (data_section(inputs), fits_section(inputs), comparison_section(inputs)) if s
    ]
    sections += figure_sections(inputs, all_model_fits(inputs), warnings)
    seeds = {label: saved.record.get("seed") for label, saved, _ in inputs.results}
    record = reproducibility_record(inputs.files, seeds, argv=argv, call=call)
    return ReportContent(title, sections, record, warnings)
