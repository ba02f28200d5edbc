"""JAX settings stopwise relies on, applied the moment JAX is imported, not before.

``import stopwise`` must not import JAX: the commands that never compute a likelihood
(``--help``, ``--version``, ``validate``, ``describe``) would pay about a second for it. Yet
everything stopwise computes needs four settings in place before JAX traces anything:

* 64-bit floats (``jax_enable_x64``);
* the persistent compilation cache folder (stopwise/_compile_cache.py);
* the data bundles registered as pytrees (stopwise.data_schemas.arrays.register_pytrees);
* stopwise's XLA flags added to ``XLA_FLAGS`` before JAX starts its CPU backend
  (stopwise/_xla_flags.py: faster compilation).

``configure_when_jax_loads()`` applies them at once if JAX is already imported, else it puts
a finder at the front of ``sys.meta_path`` that lets the normal finders locate JAX and wraps
the loader, so the settings follow the execution of ``jax/__init__.py`` directly, whoever
imports JAX (a stopwise module, the user, NumPyro). The finder removes itself on first use.
"""

from __future__ import annotations

import importlib.abc
import importlib.machinery
import os
import sys
from types import ModuleType
from typing import Any

from stopwise._compile_cache import enable_compilation_cache
from stopwise._xla_flags import add_stopwise_xla_flags, installed_jaxlib_version

ARRAYS_MODULE = "stopwise.data_schemas.arrays"


def configure_jax(jax: ModuleType) -> None:
    """Float64, the compilation cache folder, stopwise's XLA flags, and pytree registration
    of the data bundles (when their module is loaded already; otherwise it registers itself
    on import)."""
    add_stopwise_xla_flags(os.environ, installed_jaxlib_version())
    jax.config.update("jax_enable_x64", True)
    enable_compilation_cache(jax.config)
    arrays = sys.modules.get(ARRAYS_MODULE)
    if arrays is not None:
        arrays.register_pytrees(jax.tree_util)


class _ConfiguringLoader(importlib.abc.Loader):
    """The real loader of JAX, then configure_jax on the executed module; every other
    attribute is the real loader's."""

    def __init__(self, loader: Any) -> None:
        self.loader = loader

    def create_module(self, spec: importlib.machinery.ModuleSpec) -> ModuleType | None:
        return self.loader.create_module(spec)

    def exec_module(self, module: ModuleType) -> None:
        self.loader.exec_module(module)
        module.__loader__ = self.loader
        if module.__spec__ is not None:
            module.__spec__.loader = self.loader
        configure_jax(module)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.loader, name)


class _JaxImportHook(importlib.abc.MetaPathFinder):
    """Finds nothing itself: for the top-level ``jax`` it asks the other finders and wraps
    the loader they return (_ConfiguringLoader), then leaves ``sys.meta_path``."""

    def find_spec(
        self, fullname: str, path: Any = None, target: ModuleType | None = None
    ) -> importlib.machinery.ModuleSpec | None:
        if fullname != "jax":
            return None
        remove_hook(self)
        for finder in sys.meta_path:
            find = getattr(finder, "find_spec", None)
            spec = find(fullname, path, target) if find is not None else None
            if spec is not None:
                if spec.loader is not None:
                    spec.loader = _ConfiguringLoader(spec.loader)
                return spec
        return None


def remove_hook(hook: Any) -> None:
    if hook in sys.meta_path:
        sys.meta_path.remove(hook)


def configure_when_jax_loads() -> None:
    """configure_jax now if JAX is imported, else on its import (module docstring)."""
    jax = sys.modules.get("jax")
    if jax is not None:
        configure_jax(jax)
        return
    if not any(isinstance(f, _JaxImportHook) for f in sys.meta_path):
        sys.meta_path.insert(0, _JaxImportHook())
