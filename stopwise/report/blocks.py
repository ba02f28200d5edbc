"""The pieces a report is made of (Block, Section) and its loaded inputs (Inputs)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from matplotlib.figure import Figure

from stopwise.data_schemas.load import Dataset
from stopwise.figures.palette import figure_bytes
from stopwise.saved import SavedCollection, SavedFit, SavedSweep


@dataclass
class Block:
    """One element: kind "text" (a paragraph), "pre" (fixed-width text), "list" (items),
    "table" (a DataFrame) or "figure" (PNG bytes with a file stem and a caption)."""

    kind: str
    text: str = ""
    items: list[str] = field(default_factory=list)
    table: pd.DataFrame | None = None
    png: bytes = b""
    stem: str = ""


@dataclass
class Section:
    title: str
    blocks: list[Block] = field(default_factory=list)


@dataclass
class Inputs:
    """The loaded inputs: data (or None), results as (label, saved, original object)."""

    data: Dataset | None
    results: list[tuple[str, SavedFit | SavedCollection | SavedSweep, Any]]
    files: list[str]


def figure_block(fig: Figure, stem: str, caption: str) -> Block:
    """A figure rendered to PNG now (the Figure is not kept)."""
    return Block("figure", text=caption, png=figure_bytes(fig, "png"), stem=stem)
