"""Lottery-choice data: required columns, outcome/probability pairs per option, finite
outcomes, probabilities in [0, 1] summing to 1 per option, and the outcome-index limit."""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import columns as C
from .checker import Checker, quoted_labels
from .checks_limits import report_outcome_indices_beyond_limit

PROBABILITY_TOLERANCE = 1e-6


def check_lottery(ch: Checker) -> tuple[pd.DataFrame, dict]:
    ch.require(C.LOTTERY_REQUIRED)
    subject = ch.key("subject", "a participant id")
    ch.key("item", "an item id")
    choice = ch.labels("choice", C.CHOICES, True, quoted_labels(C.CHOICES))
    too_wide = report_outcome_indices_beyond_limit(ch.collector, ch.frame.columns)
    indices = C.lottery_outcome_indices(c for c in ch.frame.columns if c not in too_wide)
    for option in ("a", "b"):
        wanted = indices[option] or [1]
        for k in wanted:
            for part in ("x", "p"):
                name = f"{option}_{part}{k}"
                if not ch.has(name):
                    ch.missing_column(name, [str(c) for c in ch.frame.columns])
        check_option(ch, option, wanted)
    stats: dict = {}
    if subject is not None and choice is not None:
        stats = {
            "subjects": int(subject.values.max()) + 1 if ch.n else 0,
            "items": int(ch.frame["item"].nunique()) if ch.has("item") else 0,
            "share choosing B": float(np.mean(choice.values == 1)) if ch.n else 0.0,
        }
    return (ch.clean_frame(()) if ch.collector.ok else None), stats


def check_option(ch: Checker, option: str, indices: list[int]) -> None:
    """Outcomes need a value where their probability is positive; probabilities lie in
    [0, 1] and sum to 1 (within 1e-6) per option; an empty x/p pair is an unused slot."""
    total = np.zeros(ch.n)
    usable = np.ones(ch.n, dtype=bool)
    for k in indices:
        x = ch.numeric(
            f"{option}_x{k}",
            False,
            "a finite number (an outcome)",
            bounds=(-np.inf, np.inf, False, False),
        )
        p = ch.numeric(
            f"{option}_p{k}",
            False,
            "a probability between 0 and 1",
            bounds=(0.0, 1.0, False, False),
            range_kind="probability_range",
        )
        if x is None or p is None:
            usable[:] = False
            continue
        x_empty, p_empty = np.isnan(x.values), np.isnan(p.values)
        p_needed = np.flatnonzero(p_empty & ~x_empty)
        ch.collector.add_rows(
            "missing_value",
            ch.lines[p_needed],
            f"{option}_p{k}",
            np.full(len(p_needed), np.nan),
            "a probability for the outcome given beside it",
        )
        x_needed = np.flatnonzero(x_empty & p.ok & (p.values > 0))
        ch.collector.add_rows(
            "missing_value",
            ch.lines[x_needed],
            f"{option}_x{k}",
            np.full(len(x_needed), np.nan),
            "an outcome value where its probability is positive",
        )
        usable &= (p.ok | p_empty) & ~np.isin(np.arange(ch.n), p_needed)
        total += np.where(p.ok, p.values, 0.0)
    off = np.flatnonzero(usable & (np.abs(total - 1.0) > PROBABILITY_TOLERANCE))
    ch.collector.add_rows(
        "probability_sum",
        ch.lines[off],
        f"{option}_p*",
        total[off],
        f"the probabilities of option {option.upper()} to sum to 1 "
        f"(within {PROBABILITY_TOLERANCE:g})",
    )
