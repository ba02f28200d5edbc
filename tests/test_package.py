"""Packaging, layering and command-line plumbing (DESIGN.md contracts)."""

from __future__ import annotations

import ast
import re
import subprocess
import sys
from pathlib import Path

import pytest
from import_rules import (
    function_level,
    import_cycles,
    import_sites,
    known_modules,
    outside_violations,
    wing_violations,
)

import stopwise
from stopwise import cli

ROOT = Path(__file__).resolve().parents[1]


def test_x64_is_enabled_on_import() -> None:
    import jax
    import jax.numpy as jnp

    assert jax.config.jax_enable_x64
    assert jnp.asarray(1.0).dtype == jnp.float64


def test_every_package_folder_is_listed_for_the_wheel() -> None:
    """A non-editable install ships only the packages pyproject.toml lists: every folder with
    an __init__.py under the mapped top-level folders must be there under its import name."""
    text = (ROOT / "pyproject.toml").read_text(encoding="utf-8")  # no tomllib on 3.10
    listed = set(ast.literal_eval(re.search(r"^packages = (\[.*\])$", text, re.M).group(1)))
    mapping = re.search(r"^package-dir = \{(.*)\}$", text, re.M).group(1)
    folders = {ROOT / path: name for name, path in re.findall(r'"([^"]+)" = "([^"]+)"', mapping)}
    found = set()
    for top, name in folders.items():
        for init in top.rglob("__init__.py"):
            if ".venv" in init.parts:
                continue
            relative = init.parent.relative_to(top).parts
            found.add(".".join((name, *relative)))
    assert found - listed == set(), "add these to [tool.setuptools] packages"
    assert "stopwise.estimation.ml" in found and "stopwise.estimation.bayes" in found


def test_top_level_folders_are_mapped_into_one_package() -> None:
    import stopwise.data_schemas
    import stopwise.estimation
    import stopwise.models

    assert Path(stopwise.models.__file__).parent == ROOT / "models"
    assert Path(stopwise.estimation.__file__).parent == ROOT / "estimation"
    assert Path(stopwise.data_schemas.__file__).parent == ROOT / "data_schemas"


def _imports_of(folder: Path) -> set[str]:
    names: set[str] = set()
    for path in folder.rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module:
                names.add(node.module)
            elif isinstance(node, ast.Import):
                names.update(alias.name for alias in node.names)
    return names


@pytest.mark.parametrize(
    ("folder", "forbidden"),
    [
        (
            "data_schemas",
            ("stopwise.models", "stopwise.estimation", "stopwise.api", "stopwise.cli"),
        ),
        ("models", ("stopwise.estimation", "stopwise.api", "stopwise.cli", "stopwise.commands")),
        ("estimation", ("stopwise.api", "stopwise.cli", "stopwise.commands", "stopwise.demo")),
    ],
)
def test_data_flows_one_way(folder: str, forbidden: tuple[str, ...]) -> None:
    """DESIGN.md: models never import estimation or the face; estimation never the face."""
    bad = sorted(n for n in _imports_of(ROOT / folder) if n.startswith(forbidden))
    assert bad == []


def test_every_documented_command_is_installed() -> None:
    assert cli.available_commands() == list(cli.COMMANDS)


@pytest.mark.parametrize("name", cli.COMMANDS)
def test_every_command_has_help(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        cli.main([name, "--help"])
    assert exc.value.code == 0
    assert "usage:" in capsys.readouterr().out


def test_usage_errors_exit_2_without_traceback(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["no-such-command"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "invalid choice" in err


def test_public_api_names_resolve() -> None:
    for name in stopwise.__all__:
        assert getattr(stopwise, name) is not None


def test_module_entry_point_runs() -> None:
    done = subprocess.run(
        [sys.executable, "-m", "stopwise", "--version"], capture_output=True, text=True, check=False
    )
    assert done.returncode == 0 and "stopwise" in done.stdout


# ---------------------------------------------------------------------------------------
# The house: core <- ml, core <- bayes, the engines below the face, no hidden circles
# (DEVELOPERS.md, "How the house is laid out"; the checker is tests/import_rules.py).

ENGINE_FOLDERS = ("data_schemas", "models", "estimation")

# Imports that stay inside a function: optional heavy dependencies on optional paths, each
# measured with python -X importtime on this machine. Our own modules are never here except
# the contest models, which bring scipy.optimize with them.
LAZY_ALLOWED = {
    ("estimation/formulas.py", "patsy"): "patsy (0.5 s) only for fits with covariate formulas",
    ("estimation/formulas.py", "patsy.eval"): "the same, for the formula's variable names",
    ("estimation/distributed.py", "dask"): "Dask (0.5 s) only when a study runs on a cluster",
    ("estimation/distributed.py", "dask.distributed"): "the same, the cluster client",
    ("estimation/ml/sobol.py", "scipy.stats"): "scipy.stats (1.7 s) only past MAX_DIM "
    "parameters; the ML path never loads it otherwise",
    ("estimation/ml/profile.py", "scipy"): "scipy.stats (1.7 s) only for profile intervals",
    ("estimation/bayes/ppc.py", "matplotlib"): "matplotlib (1 s) only when a figure is drawn",
    ("estimation/bayes/ppc.py", "matplotlib.pyplot"): "the same",
    ("models/spec.py", "stopwise.models.contest.build"): "contest models load the game "
    "solvers (scipy.optimize, 0.9 s) only when a contest spec is built; contest/ never "
    "imports spec, so no circle hides here",
}


@pytest.fixture(scope="module")
def engine_sites():
    return import_sites(ROOT, ENGINE_FOLDERS)


def test_estimation_wings_import_only_the_core(engine_sites) -> None:
    """core <- ml and core <- bayes: the core imports neither wing, ml never imports bayes and
    bayes never imports ml (a Bayesian run gets its ML starts from the caller,
    estimation/point_fits.py)."""
    assert wing_violations(engine_sites) == []


@pytest.mark.parametrize(
    ("folder", "allowed"),
    [
        ("data_schemas", ("stopwise.data_schemas",)),
        ("models", ("stopwise.data_schemas", "stopwise.models")),
        ("estimation", ("stopwise.data_schemas", "stopwise.models", "stopwise.estimation")),
    ],
)
def test_engines_stay_below_the_face(engine_sites, folder: str, allowed: tuple[str, ...]) -> None:
    """Nothing under data_schemas/, models/ or estimation/ imports stopwise.* outside the
    layers below it: not stopwise._io, the API, the command line or the package root."""
    assert outside_violations(engine_sites, folder, allowed) == []


def test_no_function_level_imports_in_the_engines(engine_sites) -> None:
    """Imports sit at the top of the module, where circles show; the few lazy ones are
    optional heavy dependencies (LAZY_ALLOWED, with reasons), and every entry is in use."""
    lazy = {(site.path, site.written) for site in function_level(engine_sites)}
    assert sorted(lazy - set(LAZY_ALLOWED)) == []
    assert sorted(set(LAZY_ALLOWED) - lazy) == []


def test_no_import_circles_in_the_engines(engine_sites) -> None:
    modules = set(known_modules(ROOT, ENGINE_FOLDERS))
    assert import_cycles(engine_sites, modules) == []


def _plant(root: Path, files: dict[str, str]) -> list:
    for name, text in files.items():
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return import_sites(root, ("estimation", "models"))


HOUSE = {
    "estimation/__init__.py": "",
    "estimation/core_piece.py": "X = 1\n",
    "estimation/ml/__init__.py": "",
    "estimation/ml/fit.py": "from stopwise.estimation.core_piece import X\n",
    "estimation/bayes/__init__.py": "",
    "estimation/bayes/run.py": "from stopwise.estimation import core_piece\n",
    "models/__init__.py": "",
    "models/spec.py": "import numpy\n",
}


def test_the_checker_passes_a_clean_house(tmp_path: Path) -> None:
    sites = _plant(tmp_path, HOUSE)
    modules = set(known_modules(tmp_path, ("estimation", "models")))
    assert wing_violations(sites) == [] and function_level(sites) == []
    assert import_cycles(sites, modules) == []
    assert outside_violations(sites, "estimation", ("stopwise.estimation",)) == []


@pytest.mark.parametrize(
    ("file", "text", "rule"),
    [
        ("estimation/bayes/run.py", "from stopwise.estimation.ml.fit import X\n", "wings"),
        ("estimation/bayes/run.py", "from stopwise.estimation.ml import fit\n", "wings"),
        ("estimation/ml/fit.py", "from stopwise.estimation.bayes import run\n", "wings"),
        ("estimation/core_piece.py", "import stopwise.estimation.ml.fit\n", "wings"),
        (
            "estimation/bayes/run.py",
            "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
            "    from stopwise.estimation.ml.fit import X\n",
            "wings",
        ),
        ("estimation/ml/fit.py", "def f():\n    import json\n", "lazy"),
        ("estimation/ml/fit.py", "class A:\n    def f(self):\n        from . import x\n", "lazy"),
        ("estimation/core_piece.py", "from stopwise._io import dumps_json\n", "face"),
        ("estimation/core_piece.py", "import stopwise\n", "face"),
        ("estimation/core_piece.py", "from stopwise.estimation.ml.fit import X\n", "circle"),
        ("models/spec.py", "from . import spec\n", "circle"),
    ],
)
def test_the_checker_finds_planted_violations(tmp_path: Path, file, text, rule) -> None:
    """Each rule fails on a violation planted in a small copy of the house."""
    sites = _plant(tmp_path, {**HOUSE, file: text})
    modules = set(known_modules(tmp_path, ("estimation", "models")))
    found = {
        "wings": wing_violations(sites),
        "lazy": function_level(sites),
        "face": outside_violations(sites, "estimation", ("stopwise.estimation",)),
        "circle": import_cycles(sites, modules),
    }[rule]
    assert found
