"""The one colour palette of stopwise's figures, and writing a figure as PNG and SVG.

The eight colours are the colour-blind-safe set of Okabe & Ito (2008), in an order of our
own choosing: observed data always take ``OBSERVED``, the first fitted model ``MODELS[0]``,
the risk-neutral rule ``BENCHMARK``; sequential maps use "cividis" (Nuñez et al. 2018).
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
from matplotlib.figure import Figure

OBSERVED = "#000000"  # black: what people did
BENCHMARK = "#999999"  # grey: the risk-neutral rule
MODELS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442")
SEQUENTIAL_MAP = "cividis"
DPI = 110


def model_colour(index: int) -> str:
    """Colour of the index-th model (cycling through MODELS)."""
    return MODELS[index % len(MODELS)]


def new_figure(width: float = 8.0, height: float = 4.5) -> Figure:
    """A Figure not registered with pyplot (no global state, nothing left open)."""
    return Figure(figsize=(width, height), layout="constrained")


def figure_bytes(fig: Figure, file_format: str = "png") -> bytes:
    """The figure rendered as PNG or SVG bytes (SVG without a creation date, reproducible)."""
    buffer = io.BytesIO()
    metadata = {"Date": None} if file_format == "svg" else None
    fig.savefig(buffer, format=file_format, dpi=DPI, metadata=metadata)
    return buffer.getvalue()


def save_figure(fig: Figure, stem: str | os.PathLike[str]) -> list[Path]:
    """Write ``stem``.png and ``stem``.svg atomically; returns both paths."""
    from stopwise._io import write_atomic

    stem = Path(stem)
    return [
        write_atomic(stem.with_suffix(f".{kind}"), figure_bytes(fig, kind))
        for kind in ("png", "svg")
    ]
