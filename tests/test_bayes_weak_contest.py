"""A pooled Bayesian fit of a contest model on a short session (16 contest decisions), where
the data say little about two of three parameters (ML sd of hundreds on the unconstrained
scale): the product's fit must not diverge and its chains must agree. The data are
replication 8 of the crra+ch calibration study (benchmarks/study_sbc.py; invented design and
draws). There the study's own sampler, started at the ML point with that jitter, diverged on
every transition. The product's fit passes this test with the former start too (NumPyro
redraws a start whose density is not finite), so it guards the outcome for users, not the
change of start; tests/test_laplace_mode.py guards the start itself."""

from __future__ import annotations

import jax
import numpy as np
import pytest

import stopwise
from stopwise.commands.simulate import contest_design
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.bayes.prepare import as_bundle
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

STUDY_SEED = 20181001  # benchmarks/study_sbc.py's SEED
REPLICATION = 8
TRUTH = {"r": 0.4059177886016026, "precision": 0.10325773365924176, "tau": 0.6701907624698967}


def replication_sim_key(rep: int):
    """The simulation key of replication ``rep``: k_rep from the key chain of PRNGKey(seed),
    then split(k_rep, 3)[1] (benchmarks/study_sbc.py: replication_keys, one_replication)."""
    key = jax.random.PRNGKey(STUDY_SEED)
    for _ in range(rep + 1):
        key, k_rep = jax.random.split(key)
    return jax.random.split(k_rep, 3)[1]


@pytest.mark.slow
def test_weakly_identified_contest_fit_starts_inside_the_prior_and_does_not_diverge():
    model = build_model("crra+ch", max_target=8)
    design = contest_design(stopping_design(2, 8, (0.75,), 1.0, STUDY_SEED), 2, 10.0, True)
    frame = model.simulate(TRUTH, design, replication_sim_key(REPLICATION))
    data = as_bundle(stopwise.load(frame))
    # the case is the one it claims to be: an ML fit whose sd in z is in the hundreds
    ml = ML_POINT_FITS.pooled(model, data, se="hessian", progress=False)
    assert ml.cov_z is not None and np.sqrt(np.max(np.diag(ml.cov_z))) > 100.0
    post = fit_bayes(
        model,
        data,
        chains=2,
        draws=250,
        warmup=200,
        seed=3,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    d = post.diagnostics
    assert d["divergences"] <= 5, d
    assert d["max_rhat"] < 1.05, d
