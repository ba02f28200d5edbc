"""Contest QRE / level-k fits run in the compiled multistart again (issue 13 item 1).

The demo's contest comparison once stalled at 0% CPU inside the compiled Newton loop: gdb
showed both threads of XLA's CPU pool blocked in LAPACK's batched LU kernel
(jax::ParallelBatchMap under LuDecomposition::Kernel), each waiting for pieces of its batch
that only a free pool thread could run. The stall depended on thread timing (it struck one
of two identical runs), so this test runs the fit in a child process under a time limit: a
deadlock fails the test instead of hanging the suite. The deterministic guard is
tests/test_small_solve.py (no LU call left in the QRE's second derivatives)."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

import pytest

CHILD = textwrap.dedent(
    """
    import json
    import stopwise
    from stopwise.demo import demo_data
    from stopwise.estimation.ml import mle

    frame = demo_data(n_subjects=6)["stopping"]
    frame = frame[frame["task"] == "contest"].reset_index(drop=True)
    out = {}
    for spec in ("crra+qre", "linear+levelk"):
        fit = stopwise.fit(spec, frame, max_target=12, se="hessian", progress=False)
        out[spec] = {"z": fit.z.tolist(), "loglik": fit.loglik,
                     "algorithms": fit.optimizer["start_algorithms"]}
    mle.compiled_path_suits = lambda rows: False  # scipy's trust-exact path, as before
    for spec in ("crra+qre", "linear+levelk"):
        fit = stopwise.fit(spec, frame, max_target=12, se="hessian", progress=False)
        out[spec + " scipy"] = {"z": fit.z.tolist(), "loglik": fit.loglik,
                                "algorithms": fit.optimizer["start_algorithms"]}
    print(json.dumps(out))
    """
)


@pytest.mark.slow
def test_contest_fits_finish_in_the_compiled_loop_and_equal_scipys_path() -> None:
    done = subprocess.run(
        [sys.executable, "-c", CHILD], capture_output=True, text=True, timeout=1500
    )
    assert done.returncode == 0, done.stderr[-3000:]
    out = json.loads(done.stdout.strip().splitlines()[-1])
    for spec in ("crra+qre", "linear+levelk"):
        compiled, scipy = out[spec], out[spec + " scipy"]
        assert all(a.startswith("compiled damped Newton") for a in compiled["algorithms"])
        assert all(a.startswith("scipy trust-exact") for a in scipy["algorithms"])
        # two local optimisers meeting at one optimum (common practice, no source); 1e-8
        # relative is issue 13's agreement goal
        for a, b in zip(compiled["z"], scipy["z"]):
            assert a == pytest.approx(b, rel=1e-8, abs=1e-10)
        assert compiled["loglik"] == pytest.approx(scipy["loglik"], rel=1e-12)
