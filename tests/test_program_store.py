"""Traced programs kept across processes (estimation/program_store.py, issue 13 item 3b and
issue 17 item 4b): a program loaded from the store computes what a freshly traced one does,
a corrupt or foreign entry is rebuilt, a different model structure misses, and a second
process of a fit loads its programs instead of tracing them (seen through the store's
counters, not through a time)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import jax
import numpy as np
import pytest

import stopwise
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation import program_store as store
from stopwise.estimation.ml.compiled_multistart import newton_runs
from stopwise.estimation.ml.mle import build_problem
from stopwise.estimation.ml.problem import (
    Layout,
    PooledRows,
    row_scores,
    rows_loglik,
    unconstrained_np,
    value_grad_hess,
)
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.base import Model
from stopwise.models.spec import build_model

SPEC = "crra+myopic+logit"
ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def frame():
    design = stopping_design(15, 20, (0.6, 0.75, 0.9), 1.0, 3)
    model = build_model(SPEC)
    return model.simulate({"r": 0.4, "precision": 2.0}, design, jax.random.PRNGKey(3))


@pytest.fixture(scope="module")
def data(frame):
    return to_stopping_data(frame)


@pytest.fixture
def folder(tmp_path, monkeypatch):
    """A private store folder for this test, and an empty in-process memo."""
    where = tmp_path / "programs"
    monkeypatch.setenv("STOPWISE_PROGRAM_DIR", str(where))
    monkeypatch.setattr(store, "_IN_PROCESS", {})
    return where


def counts() -> dict[str, int]:
    return dict(store.COUNTS)


def delta(before: dict[str, int]) -> dict[str, int]:
    return {k: store.COUNTS[k] - before[k] for k in before}


def problem_of(data, spec: str = SPEC, **options):
    model = build_model(spec, **options)
    model.options["prepare"](data)
    problem, _, _ = build_problem(model, data)
    return problem


def fresh_value_grad_hess(problem, z):
    """The jitted program traced in this process, not through the store."""
    args, weights = problem.on_device()
    return [np.asarray(a) for a in value_grad_hess(problem.rows, z, args, weights)]


def stored_value_grad_hess(problem, z):
    args, weights = problem.on_device()
    out = store.call_stored("value_grad_hess", value_grad_hess, problem.rows, z, args, weights)
    return [np.asarray(a) for a in out]


def stored_rows_loglik(problem, z):
    """The cheapest program of the engine (one row log-likelihood per row), through the store."""
    args = problem.on_device()[0]
    return np.asarray(store.call_stored("rows_loglik", rows_loglik, problem.rows, z, args))


def test_a_loaded_program_equals_a_freshly_traced_one(data, folder) -> None:
    """Row log-likelihoods and row scores (the sandwich's input) from a program written,
    then read back as a new process would, against the same jitted programs traced here."""
    problem = problem_of(data)
    args = problem.on_device()[0]
    z = np.array([0.1, 0.9])
    for name, program in (("rows_loglik", rows_loglik), ("row_scores", row_scores)):
        fresh = jax.tree_util.tree_leaves(program(problem.rows, z, args))
        before = counts()
        store.call_stored(name, program, problem.rows, z, args)
        assert delta(before)["built"] == 1
        store._IN_PROCESS.clear()  # as a new process: only the folder remains
        before = counts()
        loaded = jax.tree_util.tree_leaves(store.call_stored(name, program, problem.rows, z, args))
        assert delta(before) == {"loaded": 1, "built": 0, "rejected": 0, "direct": 0}
        for a, b in zip(loaded, fresh, strict=True):
            np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-12, atol=0)


@pytest.mark.slow  # compiles the step program and the whole Newton loop twice each
def test_the_stored_step_and_newton_loop_equal_fresh_ones(data, folder) -> None:
    problem = problem_of(data)
    args, weights = problem.on_device()
    z = np.array([0.3, 0.5])
    stored_value_grad_hess(problem, z)
    store._IN_PROCESS.clear()
    before = counts()
    loaded = stored_value_grad_hess(problem, z)
    assert delta(before)["loaded"] == 1
    for a, b in zip(loaded, fresh_value_grad_hess(problem, z), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=0)
    starts = np.array([[0.0, 0.0], [1.0, -1.0]])
    w = np.asarray(weights)[None, :]
    loop_args = (starts, args, w, np.int32(100))
    fresh_loop = newton_runs(problem.rows, *loop_args)
    store.call_stored("newton_runs", newton_runs, problem.rows, *loop_args)
    store._IN_PROCESS.clear()
    before = counts()
    loaded_loop = store.call_stored("newton_runs", newton_runs, problem.rows, *loop_args)
    assert delta(before)["loaded"] == 1
    for a, b in zip(loaded_loop, fresh_loop, strict=True):
        np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-12, atol=1e-300)


def test_the_stored_likelihood_matches_a_plain_numpy_one(frame, data, folder, tmp_path) -> None:
    """Independent computation: the numpy/scipy script of benchmarks/plain_fit.py (its own
    code of the myopic CRRA logit rule, reading the CSV itself) gives the same
    log-likelihood."""
    sys.path.insert(0, str(ROOT))
    from benchmarks.plain_fit import myopic_rows_loglik, rows_from_csv

    csv = tmp_path / "rows.csv"
    frame.to_csv(csv, index=False)
    problem = problem_of(data)
    r, precision = 0.35, 2.5
    model = problem.rows.layout.model
    z = np.array(
        [unconstrained_np(model.spec("r"), r), unconstrained_np(model.spec("precision"), precision)]
    )
    ours = stored_rows_loglik(problem, z)[: data.n_obs].sum()
    theirs = myopic_rows_loglik(r, precision, **rows_from_csv(str(csv))).sum()
    np.testing.assert_allclose(ours, theirs, rtol=1e-10)


@pytest.mark.parametrize("damage", ["flip", "truncate", "foreign", "garbage"])
def test_a_corrupt_or_foreign_entry_is_rebuilt_never_trusted(data, folder, damage) -> None:
    problem = problem_of(data)
    z = np.array([0.2, 0.4])
    good = stored_rows_loglik(problem, z)
    (entry,) = folder.glob("*.program")
    blob = entry.read_bytes()
    if damage == "flip":
        blob = blob[:-100] + bytes([blob[-100] ^ 0xFF]) + blob[-99:]
    elif damage == "truncate":
        blob = blob[: len(blob) // 2]
    elif damage == "foreign":  # an entry another JAX wrote, with a consistent checksum
        line_end = blob.index(b"\n", len(store.MAGIC))
        header = json.loads(blob[len(store.MAGIC) : line_end])
        key = json.loads(header["key"])
        key["jax"] = "0.0.1"
        payload = blob[line_end + 1 :]
        blob = store.entry_bytes(json.dumps(key, sort_keys=True), payload)
    else:
        blob = b"\x00" * 64
    entry.write_bytes(blob)
    store._IN_PROCESS.clear()
    before = counts()
    again = stored_rows_loglik(problem, z)
    assert delta(before) == {"loaded": 0, "built": 1, "rejected": 1, "direct": 0}
    np.testing.assert_allclose(again, good, rtol=1e-12, atol=0)
    store._IN_PROCESS.clear()  # the rewritten entry is whole: the next process loads it
    before = counts()
    stored_rows_loglik(problem, z)
    assert delta(before)["loaded"] == 1


def test_a_changed_model_structure_misses_the_store(data, folder) -> None:
    z = np.array([0.2, 0.4])
    stored_rows_loglik(problem_of(data), z)
    assert len(list(folder.glob("*.program"))) == 1
    store._IN_PROCESS.clear()
    before = counts()
    stored_rows_loglik(problem_of(data, "crra+myopic+probit"), z)  # another noise
    stored_rows_loglik(problem_of(data, SPEC, wealth=5.0), z)  # another option
    fixed = build_model(SPEC)
    fixed.options["prepare"](data)
    fixed_problem, _, _ = build_problem(fixed, data, fixed={"precision": 2.0})
    stored_rows_loglik(fixed_problem, np.array([0.2]))  # a fixed parameter
    assert delta(before) == {"loaded": 0, "built": 3, "rejected": 0, "direct": 0}
    assert len(list(folder.glob("*.program"))) == 4
    before = counts()
    stored_rows_loglik(problem_of(data), z)  # the first model again: a hit
    assert delta(before) == {"loaded": 1, "built": 0, "rejected": 0, "direct": 0}


def test_the_planner_cap_in_use_is_part_of_the_key(data) -> None:
    """A stopping model's traced tables are sized by the caps its prepare() chose; two
    preparations that size them differently must not share a stored program."""
    model = build_model("crra+planner+logit")
    rows = PooledRows(Layout(model, model.param_names, (1, 1)))
    before = rows.program_key()
    model.options["prepare"](data)
    assert rows.program_key() != before


def test_a_model_without_a_program_key_is_called_directly(data, folder) -> None:
    """User-written models (here a copy of a built one without its key) are never stored:
    nothing names their code across processes."""
    built = build_model(SPEC)
    options = {k: v for k, v in built.options.items() if k != "program_key"}
    model = Model(built.name, built.params, built.loglik_obs, built.simulate, "stopping",
                  built.predict, options)  # fmt: skip
    problem, _, _ = build_problem(model, data)
    before = counts()
    stored_rows_loglik(problem, np.array([0.2, 0.4]))
    assert delta(before)["direct"] == 1
    assert not folder.exists() or not list(folder.glob("*.program"))


def test_a_program_jax_cannot_export_runs_directly(data, folder, monkeypatch) -> None:
    """An export failure (a model whose program JAX cannot serialise) never fails the fit:
    the program runs as it would without the store, and nothing is written."""

    def refuse(*args, **kwargs):
        raise ValueError("not exportable")

    monkeypatch.setattr(store.export, "export", refuse)
    problem = problem_of(data)
    z = np.array([0.2, 0.4])
    before = counts()
    ours = stored_rows_loglik(problem, z)
    assert delta(before) == {"loaded": 0, "built": 0, "rejected": 0, "direct": 1}
    fresh = np.asarray(rows_loglik(problem.rows, z, problem.on_device()[0]))
    np.testing.assert_allclose(ours, fresh, rtol=1e-12, atol=0)
    assert not list(folder.glob("*.program"))


def test_a_folder_others_may_write_is_not_used(data, folder) -> None:
    folder.mkdir()
    folder.chmod(0o777)
    before = counts()
    stored_rows_loglik(problem_of(data), np.array([0.2, 0.4]))
    assert delta(before)["direct"] == 1
    assert not list(folder.glob("*.program"))


def test_entries_beyond_the_limit_are_evicted_oldest_first(tmp_path) -> None:
    for i in range(5):
        path = tmp_path / f"{i}.program"
        path.write_bytes(b"x")
        os.utime(path, (1000 + i, 1000 + i))
    store.evict_oldest(tmp_path, keep=3)
    assert sorted(p.name for p in tmp_path.glob("*.program")) == [
        "2.program",
        "3.program",
        "4.program",
    ]


def test_the_store_is_off_when_asked_and_follows_the_compilation_cache(tmp_path) -> None:
    assert store.store_folder({"STOPWISE_PROGRAM_DIR": "off"}) is None
    assert store.store_folder({"STOPWISE_PROGRAM_DIR": str(tmp_path)}) == tmp_path
    jax_folder = jax.config.jax_compilation_cache_dir  # off in the test session (conftest)
    expected = None if not jax_folder else Path(jax_folder) / store.SUBFOLDER
    assert store.store_folder({}) == expected


FIT_AND_COUNT = """
import json, sys
import stopwise.cli
from stopwise.estimation import program_store
code = stopwise.cli.main(["fit", sys.argv[1], "--model", "crra+myopic+logit", "--se",
                          "hessian", "--json", sys.argv[2]])
print(json.dumps({"code": code, **program_store.COUNTS}))
"""


COUNT_ONE_PROGRAM = """
import json, sys
import numpy as np
import stopwise
from stopwise.estimation import program_store
from stopwise.estimation.ml.mle import build_problem
from stopwise.estimation.ml.problem import rows_loglik
from stopwise.models.spec import build_model
data = stopwise.load(sys.argv[1]).arrays()
model = build_model("crra+myopic+logit")
model.options["prepare"](data)
problem = build_problem(model, data)[0]
args = problem.on_device()[0]
ll = program_store.call_stored("rows_loglik", rows_loglik, problem.rows, np.zeros(2), args)
print(json.dumps({"sum": float(np.asarray(ll)[: data.n_obs].sum()), **program_store.COUNTS}))
"""


def run_counting(code: str, *argv: str, env: dict[str, str]) -> dict:
    out = subprocess.run(
        [sys.executable, "-c", code, *argv], env=env, capture_output=True, text=True, timeout=300
    )
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_a_second_process_loads_the_program_the_first_stored(tmp_path, frame) -> None:
    """Fast version of the whole-fit test below: one small program, two processes."""
    csv = tmp_path / "data.csv"
    frame.to_csv(csv, index=False)
    env = dict(os.environ, STOPWISE_PROGRAM_DIR=str(tmp_path / "programs"))
    env["STOPWISE_CACHE_DIR"] = "off"
    first = run_counting(COUNT_ONE_PROGRAM, str(csv), env=env)
    second = run_counting(COUNT_ONE_PROGRAM, str(csv), env=env)
    assert (first["built"], first["loaded"]) == (1, 0)
    assert (second["built"], second["loaded"], second["rejected"]) == (0, 1, 0)
    assert second["sum"] == pytest.approx(first["sum"], rel=1e-12)


@pytest.mark.slow  # two whole fit processes, each compiling the Newton loop (~50 s loaded)
def test_the_second_process_of_a_fit_loads_its_programs(tmp_path, frame) -> None:
    csv = tmp_path / "data.csv"
    frame.to_csv(csv, index=False)
    env = dict(os.environ, STOPWISE_PROGRAM_DIR=str(tmp_path / "programs"))
    env["STOPWISE_CACHE_DIR"] = "off"  # the XLA cache plays no part in what is counted
    first, second = (
        run_counting(FIT_AND_COUNT, str(csv), str(tmp_path / f"fit{i}.json"), env=env)
        for i in range(2)
    )
    assert first["built"] >= 2 and first["loaded"] == 0  # the Newton loop and the row scores
    assert second["loaded"] == first["built"] and second["built"] == 0
    assert first["rejected"] == second["rejected"] == 0
    fits = [json.loads((tmp_path / f"fit{i}.json").read_text()) for i in range(2)]
    for key in ("estimate", "se"):
        a, b = ([p[key] for p in f["params"]] for f in fits)
        np.testing.assert_allclose(a, b, rtol=1e-12)
    assert fits[0]["loglik"] == pytest.approx(fits[1]["loglik"], rel=1e-12)
    in_process = stopwise.fit(SPEC, stopwise.load(csv), se="hessian")
    np.testing.assert_allclose(
        [p["estimate"] for p in fits[1]["params"]],
        [in_process.estimates()[n] for n in ("r", "precision")],
        rtol=1e-8,
    )
