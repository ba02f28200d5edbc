"""The Bayes wing gets its maximum-likelihood starting fits from the caller
(estimation/point_fits.py): it uses the fits it is handed and refuses an ML start without
them, before any sampling."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.bayes.pooled_start import ml_start
from stopwise.estimation.bayes.subject_start import per_subject_estimates
from stopwise.estimation.ml.by_subject import fit_by_subject
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.point_fits import PointFits
from stopwise.models.spec import build_model

# A few decisions in the decision-level format (DESIGN.md); an input, not a check value.
ROWS = """subject,trial,step,p_survive,gain,action,outcome
s1,1,0,0.9,1,draw,success
s1,1,1,0.9,1,stop,
s1,2,0,0.8,1,draw,bust
s2,1,0,0.9,1,stop,
s2,2,0,0.8,1,draw,success
s2,2,1,0.8,1,draw,success
s2,2,2,0.8,1,stop,
"""
SPEC = "linear+myopic+logit"


@pytest.fixture(scope="module")
def data():
    return to_stopping_data(pd.read_csv(io.StringIO(ROWS)))


class Recorder:
    """A stand-in ML fit that records how it was called and then fails."""

    def __init__(self) -> None:
        self.calls: list[dict] = []

    def __call__(self, model, data, **kw):
        self.calls.append(kw)
        raise RuntimeError("stand-in fit")


@pytest.mark.parametrize(
    ("options", "what"),
    [
        ({}, "a pooled fit's ML start"),
        ({"init": "mle", "hierarchical": True}, "init='mle'"),
        ({"hierarchical": True, "init": {"precision": 1.0}}, "a hierarchical fit's start"),
    ],
)
def test_an_ml_start_without_point_fits_is_refused(data, options, what) -> None:
    with pytest.raises(ValueError, match="ML_POINT_FITS") as exc:
        fit_bayes(SPEC, data, chains=1, draws=5, warmup=5, progress=False, **options)
    assert what in str(exc.value)


def test_the_pooled_start_uses_the_fit_it_is_handed(data) -> None:
    pooled = Recorder()
    start = ml_start(build_model(SPEC), data, None, PointFits(pooled, Recorder()))
    assert pooled.calls == [{"se": "hessian", "formulas": None, "progress": False}]
    assert start.coef is None and "stand-in fit" in start.notes[0]


def test_the_handed_pooled_fit_gives_the_ml_start(data) -> None:
    model = build_model(SPEC)
    start = ml_start(model, data, None, ML_POINT_FITS)
    direct = fit_mle(model, data, se="hessian", progress=False)
    np.testing.assert_allclose(start.coef, np.asarray(direct.z), rtol=1e-12)


def test_subject_starts_come_from_the_handed_per_subject_fits(data) -> None:
    model = build_model(SPEC)
    z, se, identified = per_subject_estimates(model, data, fit_by_subject)
    fits = dict(fit_by_subject(model, data, se="hessian").fits)
    np.testing.assert_allclose(z[0], np.asarray(fits["s1"].z), rtol=1e-12)
    np.testing.assert_allclose(z[1], np.asarray(fits["s2"].z), rtol=1e-12)
    assert z.shape == se.shape == (2, len(model.param_names)) and identified.shape == (2,)
    recorder = Recorder()
    with pytest.raises(RuntimeError, match="stand-in fit"):
        per_subject_estimates(model, data, recorder)
    assert recorder.calls == [{"se": "hessian"}]
