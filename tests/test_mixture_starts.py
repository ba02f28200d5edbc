"""Every start of a mixture fit is accounted for: at the best optimum, at a lower optimum or
not converged, in the note, the optimizer record and the summary."""

from __future__ import annotations

import dataclasses
import re

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.mixture import fit_mixture
from stopwise.estimation.ml.optimize import OptimumRecord
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.estimation.ml.start_accounting import account_starts
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"


@pytest.fixture(scope="module")
def two_types():
    model = build_model(LOGIT)
    frames = []
    for seed, (precision, prefix) in enumerate(((0.3, "lo"), (3.0, "hi")), start=1):
        design = stopping_design(15, 20, (0.6, 0.75, 0.9), 1.0, seed)
        design["subject"] = prefix + design["subject"]
        frames.append(model.simulate({"precision": precision}, design, jax.random.PRNGKey(seed)))
    return to_stopping_data(pd.concat(frames, ignore_index=True))


def record(loglik: float, converged: bool) -> OptimumRecord:
    return OptimumRecord(np.zeros(1), -loglik, 0.0 if converged else 1.0, 1, converged, "")


def test_accounting_of_three_kinds_of_start() -> None:
    runs = [record(-10.0, True), record(-12.5, True), record(-3.0, False), record(-10.0005, True)]
    account = account_starts(runs)
    # a non-converged run with a higher value is never "the best"
    assert account.outcomes == ("best", "lower optimum", "not converged", "best")
    assert account.spread == pytest.approx(2.5)
    note = account.note()
    assert note is not None and "of 4 starts, 2 converged at the best optimum, 1 converged" in note
    assert "1 did not converge" in note
    assert account_starts([record(-1.0, True)] * 3).note() is None


def test_mixture_note_and_summary_count_every_start(two_types) -> None:
    fit = fit_mixture(build_model(LOGIT), two_types, k=2, starts=8, max_iter=2, se="hessian")
    outcomes = fit.optimizer["start_outcomes"]
    assert fit.optimizer["starts"] == 8 and len(outcomes) == 8
    assert (
        "not converged" in outcomes
    )  # 2 iterations (and a 3-step Newton polish) are too few for some starts
    note = next(n for n in fit.notes if n.startswith("of 8 starts"))
    numbers = [int(x) for x in re.findall(r"(\d+) (?:converged|did not)", note)]
    assert numbers == [
        outcomes.count("best"),
        outcomes.count("lower optimum"),
        outcomes.count("not converged"),
    ]
    assert sum(numbers) == 8
    assert f"{outcomes.count('not converged')} not converged" in fit.summary()
    assert fit.to_dict()["optimizer"]["start_outcomes"] == outcomes


def test_reordering_the_types_keeps_the_record_of_every_start(two_types) -> None:
    from stopwise.estimation.ml.mixture import _order_types, relabel

    fit = fit_mixture(build_model(LOGIT), two_types, k=2, starts=8, max_iter=2, se="hessian")
    problem = fit.extras["problem"]
    swapped = dataclasses.replace(fit, z=relabel(fit.z, np.array([1, 0]), problem.rows))
    ordered = _order_types(swapped, problem, problem.rows, "hessian")
    assert ordered.z is not swapped.z  # the types were put back in order by a refit
    np.testing.assert_allclose(ordered.z, fit.z, atol=1e-5)
    assert ordered.optimizer["starts"] == 8
    assert ordered.optimizer["start_outcomes"] == fit.optimizer["start_outcomes"]
    assert any(n.startswith("of 8 starts") for n in ordered.notes)
