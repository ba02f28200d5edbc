"""Repeated studies reuse their compiled programs: a second ``stopwise.recover`` of the same
spec strings and design shares the first one's models (in this process), and a cluster
worker, which unpickles a new payload for every study, keeps the first payload it saw under
the same key (``kept_payload``). Results never depend on which copy ran."""

from __future__ import annotations

import logging

import jax
import pandas as pd

import stopwise
from stopwise.api import resolve_model
from stopwise.estimation.ml import recovery
from stopwise.estimation.ml.recovery import RecoveryPayload, kept_payload, stopping_design

TRUTH = {"r": 0.4, "precision": 3.0}
STUDY = {"n_reps": 4, "subjects": 12, "trials": 10, "progress": False, "workers": 0}


def compiles_during(caplog, call):
    """(result of call(), number of XLA compilations JAX logged while it ran)."""
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="jax"), jax.log_compiles(True):
        result = call()
    return result, sum("Finished XLA compilation" in r.getMessage() for r in caplog.records)


def test_a_second_study_of_one_design_compiles_nothing_and_gives_the_same_numbers(caplog):
    def study(seed: int = 3):
        return stopwise.recover("crra+myopic+logit", TRUTH, seed=seed, **STUDY)

    first, first_compiles = compiles_during(caplog, study)
    again, again_compiles = compiles_during(caplog, study)
    assert first_compiles > 0 and again_compiles == 0
    pd.testing.assert_frame_equal(first.estimates, again.estimates)
    # another design (other survival chances) is another study: it compiles its own programs
    _, other_compiles = compiles_during(
        caplog,
        lambda: stopwise.recover(
            "crra+myopic+logit", TRUTH, seed=3, p_survive=(0.6, 0.75), **STUDY
        ),
    )
    assert other_compiles > 0


def payload(design: pd.DataFrame, key: bytes | None) -> RecoveryPayload:
    model = resolve_model("crra+myopic+logit")
    return RecoveryPayload(model, design, lambda f, h=None: f, "auto", 1, (), 2, key)


def test_a_worker_keeps_the_first_payload_of_each_key():
    design = stopping_design(4, 3, (0.8,), 1.0, 0)
    first = payload(design, b"k1")
    assert kept_payload(first) is first
    # what a worker receives for the next study: a new copy (a new model object) of the
    # same key, as Dask unpickles it
    copy = payload(design.copy(), b"k1")
    assert copy.model is not first.model
    assert kept_payload(copy) is first
    assert kept_payload(payload(design, b"k2")) is not first  # another key: its own payload
    unkeyed = payload(design, None)
    assert kept_payload(unkeyed) is unkeyed  # no key (a Model passed as a value): never shared
    for k in range(recovery.KEPT_PAYLOADS + 1):  # bounded: the oldest key is dropped
        kept_payload(payload(design, f"fill{k}".encode()))
    assert kept_payload(copy) is copy
