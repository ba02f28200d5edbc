"""Paper tables: several fits side by side, one column per model, as economists print them.

Each parameter takes two lines: the estimate, and beneath it its standard error in
parentheses (``interval="se"``) or its 95% interval in brackets (``interval="ci"``); a
parameter a model lacks is left blank. The foot gives observations, subjects,
log-likelihood, AIC = 2k - 2 lnL and BIC = k ln n - 2 lnL (Akaike 1974; Schwarz 1978).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import pandas as pd

FOOT = (
    ("n_obs", "Observations", "{:d}"),
    ("n_subjects", "Subjects", "{:d}"),
    ("loglik", "Log-likelihood", "{:.2f}"),
    ("aic", "AIC", "{:.2f}"),
    ("bic", "BIC", "{:.2f}"),
)
LATEX_SPECIAL = {
    "\\": r"\textbackslash{}",
    "_": r"\_",
    "&": r"\&",
    "%": r"\%",
    "#": r"\#",
    "$": r"\$",
    "{": r"\{",
    "}": r"\}",
    "~": r"\textasciitilde{}",
    "^": r"\^{}",
}
TABLE_SUFFIXES = (".tex", ".md", ".csv")


def number(value: Any) -> str:
    """3 decimals between 0.001 and 10^5 in absolute value, else 3 significant digits; '-' for
    a missing or non-finite value."""
    if value is None:
        return "-"
    value = float(value)
    if not math.isfinite(value):
        return "-"
    if value == 0 or 1e-3 <= abs(value) < 1e5:
        return f"{value:.3f}"
    return f"{value:#.3g}"


def _attribute(fit: Any, name: str) -> Any:
    value = getattr(fit, name, None)
    if value is None and isinstance(getattr(fit, "record", None), dict):
        value = fit.record.get(name)
    return value


def side_by_side(fits: Sequence[Any], interval: str = "se") -> pd.DataFrame:
    """The table as text cells: index (row label), one column per model (module docstring).
    Each fit needs ``model`` and ``params`` (estimate, se, ci_low, ci_high by name)."""
    if interval not in ("se", "ci"):
        raise ValueError(f"interval must be 'se' or 'ci', not {interval!r}")
    frames = [fit.params for fit in fits]
    names = list(dict.fromkeys(n for frame in frames for n in frame.index))
    columns = _column_names([str(fit.model) for fit in fits])
    rows: dict[str, list[str]] = {}
    for name in names:
        estimates, spreads = [], []
        for frame in frames:
            if name not in frame.index:
                estimates.append("")
                spreads.append("")
                continue
            row = frame.loc[name]
            estimates.append(number(row["estimate"]))
            spreads.append(
                f"({number(row['se'])})"
                if interval == "se"
                else f"[{number(row['ci_low'])}, {number(row['ci_high'])}]"
            )
        rows[str(name)] = estimates
        rows[f"{name} {'SE' if interval == 'se' else '95% CI'}"] = spreads
    for key, label, fmt in FOOT:
        values = [_attribute(fit, key) for fit in fits]
        rows[label] = [
            "-"
            if v is None or (isinstance(v, float) and not math.isfinite(v))
            else fmt.format(int(v) if fmt == "{:d}" else float(v))
            for v in values
        ]
    return pd.DataFrame.from_dict(rows, orient="index", columns=columns)


def _column_names(models: list[str]) -> list[str]:
    """Model names, numbered "(1) name", "(2) name" as papers do (unique even when repeated)."""
    return [f"({i + 1}) {m}" for i, m in enumerate(models)]


def _is_spread_row(label: str) -> bool:
    return label.endswith(" SE") or label.endswith(" 95% CI")


def latex_escape(text: str) -> str:
    return "".join(LATEX_SPECIAL.get(ch, ch) for ch in text)


def to_latex(fits: Sequence[Any], interval: str = "se") -> str:
    """A booktabs tabular (needs \\usepackage{booktabs}); the spread line has no label."""
    table = side_by_side(fits, interval)
    header = " & ".join(["", *(latex_escape(c) for c in table.columns)])
    lines = [
        r"\begin{tabular}{l" + "c" * len(table.columns) + "}",
        r"\toprule",
        header + r" \\",
        r"\midrule",
    ]
    foot_start = len(table) - len(FOOT)
    for i, (label, cells) in enumerate(table.iterrows()):
        if i == foot_start:
            lines.append(r"\midrule")
        shown = "" if _is_spread_row(str(label)) else latex_escape(str(label))
        lines.append(" & ".join([shown, *(latex_escape(c) for c in cells)]) + r" \\")
    note = "Standard errors in parentheses." if interval == "se" else "95% intervals in brackets."
    lines += [r"\bottomrule", r"\end{tabular}", f"% {note}"]
    return "\n".join(lines) + "\n"


def to_markdown(fits: Sequence[Any], interval: str = "se") -> str:
    """A pipe table; the spread line has an empty label."""
    table = side_by_side(fits, interval)
    lines = [
        "| | " + " | ".join(table.columns) + " |",
        "|---|" + "---:|" * len(table.columns),
    ]
    for label, cells in table.iterrows():
        shown = "" if _is_spread_row(str(label)) else str(label)
        lines.append(f"| {shown} | " + " | ".join(cells) + " |")
    note = "Standard errors in parentheses." if interval == "se" else "95% intervals in brackets."
    return "\n".join(lines) + f"\n\n{note}\n"


def to_csv(fits: Sequence[Any], interval: str = "se") -> str:
    """The same cells as CSV, with a "row" column naming every line (spread lines too)."""
    return side_by_side(fits, interval).rename_axis("row").to_csv()


def render_table(fits: Sequence[Any], suffix: str, interval: str = "se") -> str:
    """The table for a file ending in .tex, .md or .csv."""
    writers = {".tex": to_latex, ".md": to_markdown, ".csv": to_csv}
    return writers[suffix.lower()](fits, interval)
