"""Validation problems and the report that lists them.

Every problem names the file, the line as in the file (header = line 1; for a DataFrame or a
Parquet file, the line the row would have in a CSV with a header), the column, the offending
value and what was expected. Large files: at most ``max_per_kind`` problems of each kind are
kept, but every occurrence is counted.
"""

from __future__ import annotations

import difflib
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

# Human-readable titles of the problem kinds, in the order they are listed.
STAT_LABELS: dict[str, str] = {  # JSON keys are snake_case; the summary reads as prose
    "p_survive_values": "p_survive values",
    "gain_values": "gain values",
    "rows_by_task": "rows by task",
    "covariates": "other columns (covariates)",
}

KIND_TITLES: dict[str, str] = {
    "empty_file": "empty file",
    "not_a_table": "not a table",
    "bad_row": "malformed row",
    "missing_column": "missing column",
    "duplicate_column": "column name given twice",
    "wrong_type": "wrong type",
    "missing_value": "missing value",
    "p_survive_range": "p_survive outside (0, 1)",
    "gain_range": "gain not > 0",
    "value_range": "value out of range",
    "unknown_label": "unknown label",
    "step_negative": "negative step",
    "step_gap": "steps not consecutive",
    "duplicate_row": "duplicate row",
    "row_after_end": "row after the trial ended",
    "unfinished_trial": "trial neither stops nor busts",
    "outcome_after_stop": "outcome after stop",
    "outcome_missing": "draw without outcome",
    "bank_mismatch": "bank disagrees with start + step * gain",
    "config_changes": "design changes inside a trial",
    "contest_fields": "contest row without group/n_players/prize",
    "group_size": "contest group size differs from n_players",
    "pool_range": "pool_size / pool_bad out of range",
    "pool_p_survive": "p_survive disagrees with the pool",
    "variant_contest": "contest from a pool or with untold odds",
    "probability_range": "negative probability",
    "probability_sum": "probabilities do not sum to 1",
    "wrong_format": "unexpected data format",
    "size_limit": "beyond a documented size limit",
}


@dataclass(frozen=True)
class Problem:
    """One problem: where (file, line, column), what was found and what was expected."""

    kind: str
    file: str
    line: int | None
    column: str | None
    value: str
    expected: str
    hint: str = ""

    def format(self) -> str:
        where = self.file if self.line is None else f"{self.file}:{self.line}"
        column = f" column '{self.column}':" if self.column else ""
        found = f" found {self.value};" if self.value != "" else ""
        hint = f" {self.hint}" if self.hint else ""
        return f"{where}:{column}{found} expected {self.expected}.{hint}"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def show_value(value: Any) -> str:
    """A value as it appears in the message: quoted text, plain numbers, <empty> for NaN."""
    if value is None:
        return "<empty>"
    if isinstance(value, (float, np.floating)) and np.isnan(value):
        return "<empty>"
    if isinstance(value, str):
        return repr(value) if value.strip() else "<empty>"
    if isinstance(value, (np.integer, int)):
        return str(int(value))
    if isinstance(value, (np.floating, float)):
        return f"{float(value):.10g}"
    return repr(value)


def suggest_label(value: Any, allowed: Sequence[str]) -> str:
    """'did you mean ...?' for near-miss labels ("Stop" -> "stop", "drw" -> "draw"), else ''."""
    text = str(value).strip()
    for label in allowed:
        if text.lower() == label.lower():
            return f"did you mean {label!r}?"
    close = difflib.get_close_matches(text.lower(), [a.lower() for a in allowed], n=1, cutoff=0.6)
    if close:
        label = next(a for a in allowed if a.lower() == close[0])
        return f"did you mean {label!r}?"
    return ""


@dataclass
class ProblemCollector:
    """Gathers problems, keeping the first ``max_per_kind`` of each kind and counting all."""

    file: str
    max_per_kind: int = 20
    problems: list[Problem] = field(default_factory=list)
    counts: dict[str, int] = field(default_factory=dict)

    def add(
        self,
        kind: str,
        line: int | None,
        column: str | None,
        value: Any,
        expected: str,
        hint: str = "",
    ) -> None:
        self.counts[kind] = self.counts.get(kind, 0) + 1
        if self.counts[kind] <= self.max_per_kind:
            shown = (
                value
                if isinstance(value, str) and value.startswith("<")
                else ("" if value is None else show_value(value))
            )
            self.problems.append(Problem(kind, self.file, line, column, shown, expected, hint))

    def add_rows(
        self,
        kind: str,
        lines: np.ndarray,
        column: str | None,
        values: Any,
        expected: str | Sequence[str],
        hints: Sequence[str] | None = None,
    ) -> None:
        """Record one problem per flagged row (``lines`` ascending, ``values`` aligned);
        only the first rows up to the per-kind cap are turned into records."""
        lines = np.asarray(lines)
        if len(lines) == 0:
            return
        room = max(self.max_per_kind - self.counts.get(kind, 0), 0)
        self.counts[kind] = self.counts.get(kind, 0) + len(lines)
        values = np.asarray(values, dtype=object)
        for i in range(min(room, len(lines))):
            exp = expected if isinstance(expected, str) else expected[i]
            hint = hints[i] if hints is not None else ""
            self.problems.append(
                Problem(kind, self.file, int(lines[i]), column, show_value(values[i]), exp, hint)
            )

    @property
    def ok(self) -> bool:
        return not self.counts


@dataclass
class ValidationReport:
    """The outcome of validating one data source.

    ``data_format`` is "decisions", "trials" or "lottery" (None when it could not be told);
    ``kind`` is "stopping" or "lottery"; ``counts`` maps problem kind -> total occurrences;
    ``problems`` holds at most ``max_per_kind`` records per kind; ``stats`` summarises clean
    data (rows, subjects, trials, conditions).
    """

    source: str
    data_format: str | None
    problems: list[Problem]
    counts: dict[str, int]
    n_rows: int = 0
    max_per_kind: int = 20
    stats: dict[str, Any] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return not self.counts

    @property
    def kind(self) -> str | None:
        if self.data_format is None:
            return None
        return "lottery" if self.data_format == "lottery" else "stopping"

    @property
    def n_problems(self) -> int:
        return sum(self.counts.values())

    def summary(self) -> str:
        """One screen: the verdict, the format and the size of the data (or the counts)."""
        if not self.ok:
            lines = [f"{self.source}: {self.n_problems} problem(s) found"]
            lines += [f"  {KIND_TITLES.get(k, k)}: {n}" for k, n in self._ordered_counts()]
            return "\n".join(lines)
        head = f"{self.source}: OK ({_format_name(self.data_format)}, {self.n_rows} rows)"
        body = [
            f"  {STAT_LABELS.get(name, name)}: {_show_stat(value)}"
            for name, value in self.stats.items()
        ]
        return "\n".join([head, *body])

    def format(self) -> str:
        """The problem list, grouped by kind, with counts where the list was cut short."""
        if self.ok:
            return self.summary()
        out = [f"{self.source}: {self.n_problems} problem(s) found"]
        for kind, total in self._ordered_counts():
            records = [p for p in self.problems if p.kind == kind]
            out.append(f"{KIND_TITLES.get(kind, kind)} ({total}):")
            out += [f"  {p.format()}" for p in records]
            if total > len(records):
                out.append(f"  ... and {total - len(records)} more of this kind")
        return "\n".join(out)

    def __str__(self) -> str:
        return self.format()

    def to_dict(self) -> dict[str, Any]:
        return {
            "source": self.source,
            "ok": self.ok,
            "format": self.data_format,
            "kind": self.kind,
            "n_rows": self.n_rows,
            "n_problems": self.n_problems,
            "counts": dict(self._ordered_counts()),
            "problems": [p.to_dict() for p in self.problems],
            "stats": self.stats,
        }

    def _ordered_counts(self) -> list[tuple[str, int]]:
        order = {k: i for i, k in enumerate(KIND_TITLES)}
        return sorted(self.counts.items(), key=lambda kv: (order.get(kv[0], 99), kv[0]))


def _format_name(fmt: str | None) -> str:
    return {
        "decisions": "decision-level stopping data",
        "trials": "trial-level stopping data",
        "lottery": "lottery-choice data",
    }.get(fmt or "", "unknown format")


def _show_stat(value: Any) -> str:
    if isinstance(value, dict):
        return ", ".join(f"{k} {_show_stat(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return ", ".join(_show_stat(v) for v in value)
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)
