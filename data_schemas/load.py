"""Load stopping or lottery data from CSV, Parquet or a DataFrame, validated.

``load`` tells the format from the columns, validates everything at once (raising
``StopwiseDataError`` with the full report when anything is wrong) and converts trial-level
stopping data to decision level, so ``Dataset.frame`` is always decision level (stopping) or
lottery format.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from . import columns as C
from .arrays import LotteryData, StoppingData
from .bundle import to_lottery_data, to_stopping_data
from .convert import trials_to_decisions
from .errors import StopwiseDataError, StopwiseInputError
from .report import ValidationReport
from .validate import check_source


@dataclass(frozen=True)
class Dataset:
    """Validated data: ``frame`` (decision-level stopping rows or lottery rows), ``kind``
    ("stopping" or "lottery"), ``source`` (file name or "<DataFrame>") and the clean
    validation ``report``."""

    frame: pd.DataFrame
    kind: str
    source: str
    report: ValidationReport | None = None

    def arrays(
        self, covariates: tuple[str, ...] | list[str] = (), horizon: int | None = None
    ) -> StoppingData | LotteryData:
        """The array bundle for the models (see stopwise.data_schemas.arrays)."""
        if self.kind == "stopping":
            return to_stopping_data(self.frame, covariates=covariates, horizon=horizon)
        if horizon is not None:
            raise StopwiseInputError("horizon applies to stopping data, not lottery choices")
        return to_lottery_data(self.frame, covariates=covariates)

    @property
    def n_rows(self) -> int:
        return len(self.frame)

    @property
    def n_subjects(self) -> int:
        return int(self.frame["subject"].nunique())

    def __repr__(self) -> str:
        return (
            f"Dataset(kind={self.kind!r}, source={self.source!r}, rows={self.n_rows}, "
            f"subjects={self.n_subjects})"
        )


def load(
    source: str | os.PathLike[str] | pd.DataFrame | Dataset,
    kind: str | None = None,
    allow_censored: bool = False,
) -> Dataset:
    """Read, validate and normalise ``source``; trial-level stopping data come back at
    decision level. Raises StopwiseDataError (with ``.report``) listing every problem."""
    if isinstance(source, Dataset):
        if kind is not None and _kind_of(kind) != source.kind:
            raise StopwiseInputError(f"expected {kind} data, got {source.kind} data")
        return source
    report, clean = check_source(source, kind=kind, allow_censored=allow_censored)
    if not report.ok or clean is None:
        raise StopwiseDataError(
            f"{report.source}: the data are not valid ({report.n_problems} problem(s))\n"
            f"{report.format()}",
            report,
        )
    if report.data_format == C.TRIALS:
        clean = trials_to_decisions(clean, bank=False, validate=False)
    if report.data_format in (C.TRIALS, C.DECISIONS):
        clean = _label_columns(clean)
    return Dataset(
        clean, "lottery" if report.data_format == C.LOTTERY else "stopping", report.source, report
    )


def _kind_of(kind: str) -> str:
    return "lottery" if kind == "lottery" else "stopping"


def _label_columns(frame: pd.DataFrame) -> pd.DataFrame:
    """Store action/outcome/task as categoricals (small and fast at millions of rows)."""
    labels: dict[str, Any] = {"action": C.ACTIONS, "outcome": C.OUTCOMES, "task": C.TASKS}
    for name, allowed in labels.items():
        if name in frame.columns and not isinstance(frame[name].dtype, pd.CategoricalDtype):
            frame[name] = pd.Categorical(frame[name], categories=list(allowed))
    for name in ("trial", "step"):
        if name in frame.columns and frame[name].dtype != np.int64:
            frame[name] = frame[name].astype(np.int64)
    return frame
