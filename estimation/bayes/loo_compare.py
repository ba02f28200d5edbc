"""Comparison of Bayesian fits by PSIS-LOO expected log predictive density (ArviZ;
Vehtari, Gelman & Gabry 2017)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.diagnostics import PARETO_K_MAX
from stopwise.estimation.bayes.posterior import Posterior

# ---------------------------------------------------------------------------------------
# Comparison by PSIS-LOO.


@dataclass
class LooComparison:
    """Models ranked by ELPD (PSIS-LOO): a tidy frame, notes and a printed table."""

    table: pd.DataFrame
    notes: list[str]
    unit: str = "trial"

    def __str__(self) -> str:
        cols = [
            "rank",
            "elpd_loo",
            "se",
            "elpd_diff",
            "dse",
            "p_loo",
            "weight",
            "n_pareto_k_above_0.7",
        ]
        text = self.table[cols].to_string(float_format=lambda v: f"{v:.2f}")
        return "\n".join(
            [
                f"Model comparison by leave-one-{self.unit}-out elpd (higher is better)",
                text,
                *[f"note: {n}" for n in self.notes],
            ]
        )

    def summary(self) -> str:
        return str(self)

    def to_dict(self) -> dict[str, Any]:
        records = self.table.reset_index().to_dict(orient="records")
        return {
            "method": "bayes",
            "criterion": "elpd_loo",
            "unit": self.unit,
            "models": records,
            "notes": list(self.notes),
        }


def loo_compare(fits: Sequence[Posterior], names: Sequence[str] | None = None) -> LooComparison:
    """Rank by ELPD with differences and their SEs (ArviZ compare, stacking weights); flag
    Pareto k > 0.7 (Vehtari, Gelman & Gabry 2017)."""
    if len(fits) < 2:
        raise StopwiseInputError("comparison needs at least two models")
    names = list(names) if names is not None else [f.name for f in fits]
    if len(set(names)) != len(names):
        names = [f"{n} #{i + 1}" for i, n in enumerate(names)]
    units = {f.unit_name for f in fits}
    sizes = {f.idata.log_likelihood["obs"].shape[-1] for f in fits}
    if len(units) > 1 or len(sizes) > 1:
        raise StopwiseInputError(
            "models compared by LOO must be fitted to the same data with the same pointwise "
            f"unit; got units {sorted(units)} and sizes {sorted(sizes)}"
        )
    loos = {n: f.loo() for n, f in zip(names, fits)}
    table = az.compare(loos, ic="loo")
    table = table.rename(columns={"elpd_loo": "elpd_loo", "d_loo": "elpd_diff"})
    if "elpd_diff" not in table.columns and "elpd_loo" in table.columns:
        table["elpd_diff"] = table["elpd_loo"].max() - table["elpd_loo"]
    table["n_pareto_k_above_0.7"] = [
        int(np.sum(np.asarray(loos[n].pareto_k) > PARETO_K_MAX)) for n in table.index
    ]
    table.index.name = "model"
    notes = []
    for n in table.index:
        bad = int(table.loc[n, "n_pareto_k_above_0.7"])
        if bad:
            notes.append(
                f"{n}: {bad} of {np.asarray(loos[n].pareto_k).size} units have Pareto k > "
                f"{PARETO_K_MAX}; PSIS-LOO is unreliable for this model (refit leaving those "
                "units out, or use K-fold cross-validation)"
            )
    unit = units.pop()
    methods = {f.loo_summary()["method"] for f in fits}
    notes.insert(
        0,
        f"every model scored by the same unit: leave-one-{unit}-out ({'; '.join(sorted(methods))})",
    )
    best = table.index[0]
    for n in table.index[1:]:
        diff, dse = float(table.loc[n, "elpd_diff"]), float(table.loc[n, "dse"])
        if dse > 0 and diff < 2 * dse:
            notes.append(
                f"{best} vs {n}: the ELPD difference {diff:.1f} is within two SEs "
                f"({dse:.1f}); the data do not clearly separate them"
            )
    unconverged = [n for n, f in zip(names, fits) if not f.converged]
    if unconverged:
        notes.append(f"not converged (see their warnings): {', '.join(unconverged)}")
    return LooComparison(table=table, notes=notes, unit=unit)
