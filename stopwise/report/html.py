"""The report as one self-contained HTML page: figures embedded as base64 PNG data URIs,
an inline style sheet, no script, no font or any other file fetched from anywhere."""

from __future__ import annotations

import base64
import html
import json
from typing import Any

import pandas as pd

from stopwise.report.blocks import Block
from stopwise.report.content import ReportContent

STYLE = """
body { font-family: system-ui, sans-serif; max-width: 70rem; margin: 2rem auto;
       padding: 0 1rem; color: #1a1a1a; line-height: 1.45; }
h1 { border-bottom: 3px solid #0072B2; padding-bottom: .3rem; }
h2 { margin-top: 2.2rem; border-bottom: 1px solid #ccc; }
nav ul { columns: 2; }
table { border-collapse: collapse; margin: .8rem 0; font-size: .9rem; }
th, td { padding: .25rem .6rem; border-bottom: 1px solid #ddd; text-align: right; }
th:first-child, td:first-child { text-align: left; }
thead th { border-bottom: 2px solid #444; }
.scroll { overflow-x: auto; }
figure { margin: 1.2rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { font-size: .9rem; color: #444; max-width: 60rem; }
.warning { background: #fff4e5; border-left: 4px solid #D55E00; padding: .5rem 1rem; }
.caution { font-size: .9rem; color: #444; border-left: 4px solid #999; padding-left: 1rem; }
pre { background: #f6f6f6; padding: .6rem; overflow-x: auto; }
"""


def cell_text(value: Any) -> Any:
    """None and NaN as '-', floats to 4 significant digits, anything else as it is."""
    if value is None or (isinstance(value, float) and pd.isna(value)):
        return "-"
    if isinstance(value, float):
        return f"{value:.4g}"
    return value


def table_html(frame: pd.DataFrame) -> str:
    """A DataFrame as an escaped HTML table (numbers to 4 significant digits)."""
    shown = frame.copy()
    for column in shown.columns:
        if pd.api.types.is_float_dtype(shown[column]):
            shown[column] = shown[column].map(lambda v: "-" if pd.isna(v) else f"{v:.4g}")
        elif shown[column].dtype == object:
            shown[column] = shown[column].map(cell_text)
    numbered = isinstance(shown.index, pd.RangeIndex)  # row numbers tell a reader nothing
    text = shown.to_html(border=0, na_rep="-", escape=True, index=not numbered)
    return f'<div class="scroll">{text}</div>'


def block_html(block: Block) -> str:
    if block.kind == "text":
        return f"<p>{html.escape(block.text)}</p>"
    if block.kind == "pre":
        return f"<pre>{html.escape(block.text)}</pre>"
    if block.kind == "list":
        items = "".join(f"<li>{html.escape(i)}</li>" for i in block.items)
        return f"<ul>{items}</ul>" if items else ""
    if block.kind == "table":
        return table_html(block.table)
    if block.kind == "figure":
        data = base64.b64encode(block.png).decode("ascii")
        caption = html.escape(block.text)
        return (
            f'<figure id="{html.escape(block.stem)}"><img src="data:image/png;base64,{data}" '
            f'alt="{caption}"><figcaption>{caption}</figcaption></figure>'
        )
    raise ValueError(f"unknown block kind {block.kind!r}")


def record_html(record: dict[str, Any]) -> str:
    """The reproducibility record: command, inputs with SHA-256, seeds, versions, date."""
    inputs = "".join(
        f"<tr><td>{html.escape(i['file'])}</td><td><code>{i['sha256']}</code></td></tr>"
        for i in record["inputs"]
    )
    versions = ", ".join(
        f"{html.escape(k)} {html.escape(v)}" for k, v in record["versions"].items()
    )
    machine = ", ".join(f"{k}: {html.escape(v)}" for k, v in record["machine"].items())
    seeds = html.escape(json.dumps(record["seeds"]))
    return (
        f"<p>Command:</p><pre>{html.escape(record['command'])}</pre>"
        f"<table><thead><tr><th>input file</th><th>SHA-256</th></tr></thead>"
        f"<tbody>{inputs or '<tr><td>(none)</td><td></td></tr>'}</tbody></table>"
        f"<p>Seeds: <code>{seeds}</code></p><p>Versions: {versions}</p>"
        f"<p>Date (UTC): {html.escape(record['date'])}. Machine: {machine}.</p>"
    )


def render_html(content: ReportContent) -> str:
    """The whole page (module docstring)."""
    sections = [(s.title, "".join(block_html(b) for b in s.blocks)) for s in content.sections]
    if content.warnings:
        items = "".join(f"<li>{html.escape(w)}</li>" for w in content.warnings)
        sections.append(("Warnings", f'<div class="warning"><ul>{items}</ul></div>'))
    sections.append(("Reproducibility record", record_html(content.record)))
    anchors = [f"s{i}" for i in range(len(sections))]
    nav = "".join(
        f'<li><a href="#{a}">{html.escape(t)}</a></li>' for a, (t, _) in zip(anchors, sections)
    )
    body = "".join(
        f'<section id="{a}"><h2>{html.escape(t)}</h2>{inner}</section>'
        for a, (t, inner) in zip(anchors, sections)
    )
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{html.escape(content.title)}</title><style>{STYLE}</style></head><body>"
        f"<h1>{html.escape(content.title)}</h1>"
        f'<p class="caution">{html.escape(content.disclaimer)}</p>'
        f"<nav><ul>{nav}</ul></nav>{body}</body></html>\n"
    )
