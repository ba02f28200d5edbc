"""Packaging, layering and command-line plumbing (DESIGN.md contracts)."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

import stopwise
from stopwise import cli

ROOT = Path(__file__).resolve().parents[1]


def test_x64_is_enabled_on_import() -> None:
    import jax
    import jax.numpy as jnp

    assert jax.config.jax_enable_x64
    assert jnp.asarray(1.0).dtype == jnp.float64


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
