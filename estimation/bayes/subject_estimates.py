"""Per-subject estimates of a hierarchical Bayesian fit, for the summary and the JSON.

Each subject's natural-scale parameter theta_{s,k} has draws from the joint posterior; the
fit reports its posterior mean, posterior sd, highest-density interval, R-hat and bulk ESS
(``Posterior.subject_params``, a long table with one row per subject and parameter).
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

SUMMARY_SUBJECT_LIMIT = 40  # subjects listed in summary(); the JSON holds all


def subject_records(table: pd.DataFrame | None) -> list[dict[str, Any]]:
    """JSON rows: {"subject", "param", "estimate", "se", "ci_low", "ci_high", "r_hat",
    "ess_bulk"} per subject and parameter (non-finite numbers become null on writing)."""
    if table is None:
        return []
    return [
        {k: (v.item() if hasattr(v, "item") else v) for k, v in row.items()}
        for row in table.to_dict(orient="records")
    ]


def _cell(estimate: float, low: float, high: float) -> str:
    if not all(math.isfinite(v) for v in (estimate, low, high)):
        return f"{estimate:.4g} [-]"
    return f"{estimate:.4g} [{low:.4g}, {high:.4g}]"


def subject_lines(
    table: pd.DataFrame | None, hdi_prob: float, limit: int = SUMMARY_SUBJECT_LIMIT
) -> list[str]:
    """Summary lines: one row per subject, each parameter as "mean [hdi low, hdi high]";
    beyond ``limit`` subjects a line says where the rest are (JSON key "subjects")."""
    if table is None or table.empty:
        return []
    cells = table.assign(
        cell=[
            _cell(e, lo, hi)
            for e, lo, hi in zip(table["estimate"], table["ci_low"], table["ci_high"])
        ]
    )
    wide = cells.pivot(index="subject", columns="param", values="cell")
    wide = wide[list(dict.fromkeys(table["param"]))]
    shown = wide.iloc[:limit]
    lines = [
        f"subject estimates (posterior mean [{hdi_prob:.0%} HDI], natural scale):",
        shown.to_string(),
    ]
    if len(wide) > limit:
        lines.append(
            f"... {len(wide) - limit} more subjects in the JSON key subjects "
            "(Python: fit.subject_params)"
        )
    return lines
