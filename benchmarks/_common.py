"""Shared helpers for benchmarks: timing, peak memory, and RESULTS.md sections.

Each ``benchmarks/bench_*.py`` module exposes ``main() -> str`` returning a Markdown section
(starting with a ``## `` heading); ``write_section`` stores it in RESULTS.md between markers
so that benchmarks can be re-run one at a time without losing the others' figures.
Times are wall-clock on a shared machine: we report ratios against a baseline measured in
the same process, never absolute goals inside tests.
"""

from __future__ import annotations

import datetime as _dt
import os
import platform
import re
import time
import tracemalloc
from collections.abc import Callable
from pathlib import Path
from typing import Any

RESULTS = Path(__file__).with_name("RESULTS.md")


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    mem = ""
    try:
        pages = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        mem = f", {pages / 2**30:.0f} GiB"
    except (ValueError, OSError):
        pass
    return f"{cpu}, {os.cpu_count()} cores{mem}, Python {platform.python_version()}"


def timed(fn: Callable[..., Any], *args: Any) -> tuple[Any, float]:
    """(fn(*args), wall-clock seconds of that one call)."""
    t0 = time.perf_counter()
    value = fn(*args)
    return value, time.perf_counter() - t0


def best_time(fn: Callable[[], Any], repeat: int = 5, number: int = 1) -> float:
    """Best wall-clock seconds per call over ``repeat`` rounds of ``number`` calls."""
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(number):
            fn()
        best = min(best, (time.perf_counter() - t0) / number)
    return best


def peak_memory_mib(fn: Callable[[], Any]) -> tuple[Any, float]:
    """Run ``fn`` once under tracemalloc; return its value and the peak in MiB (Python heap
    plus numpy buffers, which numpy reports to tracemalloc)."""
    tracemalloc.start()
    try:
        value = fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return value, peak / 2**20


def write_section(key: str, markdown: str) -> None:
    """Replace (or append) the section ``key`` of RESULTS.md, stamped with machine and date."""
    stamp = f"_Measured {_dt.date.today().isoformat()} on {machine()}._\n\n"
    block = f"<!-- {key}:begin -->\n{markdown.rstrip()}\n\n{stamp}<!-- {key}:end -->"
    text = (
        RESULTS.read_text(encoding="utf-8")
        if RESULTS.exists()
        else (
            "# Benchmark results\n\nWritten by `make bench` (and the study scripts it names). "
            "Each figure is a ratio against a baseline run in the same process, with the "
            "machine and date of the run.\n"
        )
    )
    pattern = re.compile(rf"<!-- {re.escape(key)}:begin -->.*?<!-- {re.escape(key)}:end -->", re.S)
    text = (
        pattern.sub(lambda _: block, text)
        if pattern.search(text)
        else f"{text.rstrip()}\n\n{block}\n"
    )
    RESULTS.write_text(text, encoding="utf-8")
