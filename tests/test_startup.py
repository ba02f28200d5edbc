"""Start-up: commands that compute no likelihood import neither JAX nor the estimation stack;
JAX, once imported, is configured for stopwise whatever the import order
(stopwise/_jax_setup.py)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

# A few decisions in the decision-level format (DESIGN.md); an input file, not a check value.
TINY = """subject,trial,step,p_survive,gain,action,outcome
s1,1,0,0.9,1,draw,success
s1,1,1,0.9,1,stop,
s1,2,0,0.8,1,draw,bust
s2,1,0,0.9,1,stop,
s2,2,0,0.8,1,draw,success
s2,2,1,0.8,1,draw,success
s2,2,2,0.8,1,stop,
"""

HEAVY = ("jax", "jaxlib", "numpyro", "statsmodels")

PROBE = """
import contextlib, io, json, sys
from stopwise.cli import main
out = io.StringIO()
with contextlib.redirect_stdout(out), contextlib.redirect_stderr(out):
    try:
        code = main(sys.argv[1:])
    except SystemExit as exc:
        code = exc.code
print(json.dumps({"code": code, "modules": sorted(sys.modules)}))
"""


def run_python(code: str, *args: str, **env_changes: str) -> str:
    env = {k: v for k, v in os.environ.items() if k != "JAX_COMPILATION_CACHE_DIR"}
    env.update(env_changes)
    out = subprocess.run(
        [sys.executable, "-c", code, *args],
        env=env,
        capture_output=True,
        text=True,
        check=True,
        timeout=300,
    )
    return out.stdout.strip().splitlines()[-1]


def modules_after(*argv: str, **env: str) -> tuple[int, set[str]]:
    result = json.loads(run_python(PROBE, *argv, **env))
    return result["code"], set(result["modules"])


@pytest.fixture(scope="module")
def tiny_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("startup") / "tiny.csv"
    path.write_text(TINY, encoding="utf-8")
    return path


@pytest.mark.parametrize("argv", [["--help"], ["--version"], ["validate"], ["describe"]])
def test_light_commands_import_neither_jax_nor_the_estimation_stack(argv, tiny_file) -> None:
    args = [*argv, str(tiny_file)] if argv[0] in ("validate", "describe") else argv
    code, modules = modules_after(*args)
    assert code == 0
    assert not [m for m in modules if m.split(".")[0] in HEAVY or m in HEAVY]
    assert not [m for m in modules if m.startswith("stopwise.estimation")]


def test_fit_imports_what_it_uses_and_not_the_sampler(tiny_file, tmp_path) -> None:
    out = tmp_path / "fit.json"
    code, modules = modules_after(
        "fit",
        str(tiny_file),
        "--model",
        "linear+myopic+logit",
        "--se",
        "hessian",
        "--json",
        str(out),
        STOPWISE_CACHE_DIR="off",
    )
    assert code == 0 and out.exists()
    assert {"jax", "stopwise.estimation.ml.mle"} <= modules
    assert not [m for m in modules if m.split(".")[0] == "numpyro"]
    assert not [m for m in modules if m.startswith("stopwise.estimation.bayes")]


CONFIGURED = """
import json, sys
{imports}
import jax, jax.numpy as jnp
from stopwise.data_schemas.arrays import StoppingData
from stopwise.data_schemas.bundle import to_stopping_data
import pandas as pd, io
data = to_stopping_data(pd.read_csv(io.StringIO(sys.argv[1])))
leaves = jax.tree_util.tree_leaves(data)
print(json.dumps({{
    "x64": bool(jax.config.jax_enable_x64),
    "dtype": str(jnp.asarray(1.0).dtype),
    "cache": jax.config.jax_compilation_cache_dir,
    "leaves": len(leaves),
    "horizon": jax.tree_util.tree_unflatten(jax.tree_util.tree_structure(data), leaves).horizon,
}}))
"""


@pytest.mark.parametrize(
    "imports",
    [
        "import stopwise",  # JAX imported after stopwise: the import hook configures it
        "import jax; import stopwise",  # JAX first: configured at stopwise's import
        "import stopwise.data_schemas.arrays",  # bundles defined before JAX is loaded
    ],
)
def test_jax_is_configured_whatever_the_import_order(imports, tmp_path) -> None:
    folder = tmp_path / "cache"
    code = CONFIGURED.format(imports=imports)
    result = json.loads(run_python(code, TINY, STOPWISE_CACHE_DIR=str(folder)))
    assert result["x64"] and result["dtype"] == "float64"
    assert Path(result["cache"]) == folder
    assert result["leaves"] > 10  # the bundle is a pytree (an unregistered one is 1 leaf)
    assert result["horizon"] == 3


def test_the_command_line_names_the_scheduler_variable_as_the_runner_does() -> None:
    """commands/_cluster.py keeps its own copy of the name so that light commands do not
    import the estimation package; both must say the same."""
    from stopwise.commands import _cluster
    from stopwise.estimation import distributed

    assert _cluster.SCHEDULER_ENV == distributed.SCHEDULER_ENV == "STOPWISE_SCHEDULER"
