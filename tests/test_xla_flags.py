"""stopwise's XLA flags (stopwise/_xla_flags.py): added to XLA_FLAGS before JAX starts its
backend, never over a flag the user set, and changing compile time only, not results."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from stopwise import _xla_flags as xf

EMITTERS = "xla_cpu_use_fusion_emitters"


def test_merge_appends_missing_flags_and_keeps_the_users() -> None:
    wanted = ("--a=false", "--b=1")
    assert xf.merged_flags("", wanted) == "--a=false --b=1"
    assert xf.merged_flags("--a=true", wanted) == "--a=true --b=1"
    assert xf.merged_flags("--c=2 --b=7", wanted) == "--c=2 --b=7 --a=false"
    assert xf.merged_flags("--a --b", wanted) == "--a --b"


@pytest.mark.parametrize(
    ("version", "knows"),
    [
        ("0.4.35", False),
        ("0.9.2", False),
        ("0.10.0", True),
        ("0.10.2", True),
        ("0.10.0rc1", True),
        ("1.0", True),
    ],
)
def test_flags_only_for_jaxlib_versions_that_know_them(version: str, knows: bool) -> None:
    assert xf.jaxlib_knows_flags(version) is knows
    users = "--xla_force_host_platform_device_count=2"
    environ = {"XLA_FLAGS": users}
    xf.add_stopwise_xla_flags(environ, version)
    expected = [users, *xf.STOPWISE_XLA_FLAGS] if knows else [users]
    assert environ["XLA_FLAGS"].split() == expected


def test_no_jaxlib_leaves_the_environment_alone() -> None:
    environ: dict[str, str] = {}
    xf.add_stopwise_xla_flags(environ, None)
    assert environ == {}


# A small pooled fit in a fresh process: its XLA_FLAGS after JAX started and its result.
FIT_CODE = """
import json, os
import stopwise
from stopwise.demo import demo_data
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.mle import fit_mle
from stopwise.models.spec import build_model
frame = demo_data(n_subjects=4)["stopping"]
fit = fit_mle(build_model("crra+myopic+logit"), to_stopping_data(frame[frame["task"] == "solo"]))
print(json.dumps({"flags": os.environ.get("XLA_FLAGS", ""), "loglik": float(fit.loglik),
                  "estimates": [float(v) for v in fit.params["estimate"]]}))
"""


LEVEL_0 = "--xla_backend_optimization_level=0"  # the suite's compile setting (conftest)


def fit_in_fresh_process(xla_flags: str) -> dict:
    env = {**os.environ, "XLA_FLAGS": xla_flags, "STOPWISE_CACHE_DIR": "off"}
    out = subprocess.run(
        [sys.executable, "-c", FIT_CODE], env=env, capture_output=True, text=True, check=True
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_stopwise_sets_the_flag_the_installed_jaxlib_accepts_and_results_do_not_move() -> None:
    ours = fit_in_fresh_process(LEVEL_0)
    assert ours["flags"].split() == [LEVEL_0, f"--{EMITTERS}=false"]  # added; XLA accepted it
    theirs = fit_in_fresh_process(f"{LEVEL_0} --{EMITTERS}=true")
    assert theirs["flags"].split() == [LEVEL_0, f"--{EMITTERS}=true"]  # the user's choice
    # a code-generation choice, not a change of the maths: the same optimum to rounding
    assert ours["loglik"] == pytest.approx(theirs["loglik"], rel=1e-12)
    assert ours["estimates"] == pytest.approx(theirs["estimates"], rel=1e-7, abs=1e-9)
