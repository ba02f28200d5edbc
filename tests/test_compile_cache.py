"""Where stopwise puts JAX's persistent compilation cache (stopwise/_compile_cache.py)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import jax
import pytest

from stopwise import _compile_cache as cc


def test_default_folder_names_jax_version_and_processor(tmp_path):
    folder = cc.chosen_cache_dir({"XDG_CACHE_HOME": str(tmp_path)}, None)
    assert folder is not None
    assert folder.parent == tmp_path / "stopwise"
    assert folder.name == f"jax-{jax.__version__}-{cc.processor_fingerprint()}"
    assert len(cc.processor_fingerprint()) == 12


@pytest.mark.parametrize("value", ["off", "OFF", "0", "", "none"])
def test_cache_can_be_switched_off(value):
    assert cc.chosen_cache_dir({"STOPWISE_CACHE_DIR": value}, None) is None


def test_explicit_folder_is_used(tmp_path):
    environ = {"STOPWISE_CACHE_DIR": str(tmp_path / "here")}
    assert cc.chosen_cache_dir(environ, None) == tmp_path / "here"


def test_a_cache_the_user_set_for_jax_is_left_alone(tmp_path):
    ours = {"STOPWISE_CACHE_DIR": str(tmp_path / "ours")}
    theirs = {**ours, "JAX_COMPILATION_CACHE_DIR": str(tmp_path / "theirs")}
    assert cc.chosen_cache_dir(theirs, None) is None
    assert cc.chosen_cache_dir(ours, str(tmp_path / "set in jax.config")) is None


def run_python(code: str, **env_changes: str) -> str:
    env = {k: v for k, v in os.environ.items() if k != "JAX_COMPILATION_CACHE_DIR"}
    env.update(env_changes)
    out = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True
    )
    return out.stdout.strip()


def test_importing_stopwise_points_jax_at_the_folder(tmp_path):
    folder = tmp_path / "cache"
    code = "import jax, stopwise; print(jax.config.jax_compilation_cache_dir)"
    assert Path(run_python(code, STOPWISE_CACHE_DIR=str(folder))) == folder
    assert folder.is_dir()
    assert run_python(code, STOPWISE_CACHE_DIR="off") == "None"


@pytest.mark.parametrize(("mode", "fragment"), [(0o777, "others"), (0o770, "its group")])
def test_a_cache_folder_writable_by_others_is_refused(tmp_path, mode, fragment):
    """Compiled programs are loaded from the cache, so a folder others can write is unsafe
    (issue 22 item 3)."""
    folder = tmp_path / "shared"
    folder.mkdir()
    folder.chmod(mode)
    assert fragment in cc.cache_folder_problem(folder)
    folder.chmod(0o700)
    assert cc.cache_folder_problem(folder) is None


def test_importing_stopwise_skips_an_unsafe_cache_with_a_warning(tmp_path):
    folder = tmp_path / "shared"
    folder.mkdir()
    folder.chmod(0o777)
    env = {k: v for k, v in os.environ.items() if k != "JAX_COMPILATION_CACHE_DIR"}
    env["STOPWISE_CACHE_DIR"] = str(folder)
    done = subprocess.run(
        [sys.executable, "-c", "import jax, stopwise; print(jax.config.jax_compilation_cache_dir)"],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0
    assert done.stdout.strip() == "None"
    assert "writable by others" in done.stderr


def test_a_new_cache_folder_is_private(tmp_path):
    folder = tmp_path / "fresh" / "cache"
    run_python("import stopwise, jax", STOPWISE_CACHE_DIR=str(folder))  # set up when JAX loads
    assert os.stat(folder).st_mode & 0o777 == 0o700
