"""The report as Markdown with its figures as PNG files in a folder beside it
(``<stem>_figures/``), linked by relative paths."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from stopwise.report.blocks import Block
from stopwise.report.content import ReportContent


def table_markdown(frame: pd.DataFrame) -> str:
    """A pipe table; cells with '|' escaped, floats to 4 significant digits."""
    numbered = isinstance(frame.index, pd.RangeIndex) and frame.index.name is None
    shown = frame if numbered else frame.reset_index()
    if not numbered and frame.index.name is None:
        shown = shown.rename(columns={"index": ""})  # row labels need no heading

    def cell(value: object) -> str:
        if isinstance(value, float):
            return "-" if pd.isna(value) else f"{value:.4g}"
        return str(value).replace("|", "\\|")

    lines = ["| " + " | ".join(cell(c) for c in shown.columns) + " |"]
    lines.append("|" + "---|" * len(shown.columns))
    lines += [
        "| " + " | ".join(cell(v) for v in row) + " |" for row in shown.itertuples(index=False)
    ]
    return "\n".join(lines)


def block_markdown(block: Block, figure_folder: str) -> str:
    if block.kind == "text":
        return block.text
    if block.kind == "pre":
        return "```\n" + block.text + "\n```"
    if block.kind == "list":
        return "\n".join(f"- {i}" for i in block.items)
    if block.kind == "table":
        return table_markdown(block.table)
    if block.kind == "figure":
        return f"![{block.text}]({figure_folder}/{block.stem}.png)\n\n*{block.text}*"
    raise ValueError(f"unknown block kind {block.kind!r}")


def render_markdown(content: ReportContent, figure_folder: str) -> str:
    parts = [f"# {content.title}", f"> {content.disclaimer}"]
    for section in content.sections:
        parts.append(f"## {section.title}")
        parts += [block_markdown(b, figure_folder) for b in section.blocks]
    if content.warnings:
        parts.append("## Warnings")
        parts.append("\n".join(f"- {w}" for w in content.warnings))
    record = content.record
    parts += [
        "## Reproducibility record",
        "Command:\n\n```\n" + record["command"] + "\n```",
        table_markdown(pd.DataFrame(record["inputs"] or [{"file": "(none)", "sha256": ""}])),
        f"Seeds: `{json.dumps(record['seeds'])}`",
        "Versions: " + ", ".join(f"{k} {v}" for k, v in record["versions"].items()),
        f"Date (UTC): {record['date']}. Machine: "
        + ", ".join(f"{k}: {v}" for k, v in record["machine"].items()),
    ]
    return "\n\n".join(p for p in parts if p) + "\n"


def figure_files(content: ReportContent) -> dict[str, bytes]:
    """File name -> PNG bytes of every figure."""
    return {
        f"{b.stem}.png": b.png for s in content.sections for b in s.blocks if b.kind == "figure"
    }


def figure_folder_for(out: Path) -> Path:
    return out.with_name(f"{out.stem}_figures")
