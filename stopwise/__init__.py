"""stopwise: fit models of risk preference and strategic play to stopping and lottery data.

Importing the package does not import JAX. The moment JAX is imported (by stopwise or
anyone) it is switched to 64-bit floats (every likelihood runs in float64), its persistent
compilation cache is pointed at a per-user folder, so that a later run of the same fit loads
its compiled programs (stopwise/_compile_cache.py; ``STOPWISE_CACHE_DIR=off`` switches it
off), and the data bundles become pytrees (stopwise/_jax_setup.py).
Public names are resolved lazily (a deliberate lazy import, for start-up speed) so that
``import stopwise`` stays fast and the command line starts quickly.
"""

import importlib as _importlib
from typing import Any as _Any

from stopwise._jax_setup import configure_when_jax_loads as _configure_when_jax_loads

_configure_when_jax_loads()

__version__ = "0.1.0"

# public name -> "module:attribute"
_EXPORTS: dict[str, str] = {
    # data
    "load": "stopwise.data_schemas.load:load",
    "validate": "stopwise.validate_parts:validate",  # files, DataFrames, Parquet folders
    "trials_to_decisions": "stopwise.data_schemas.convert:trials_to_decisions",
    "decisions_to_trials": "stopwise.data_schemas.convert:decisions_to_trials",
    "describe": "stopwise.describe_parts:describe",  # files, DataFrames, Parquet folders
    # models
    "model": "stopwise.models.spec:build_model",
    "simulate": "stopwise.models.simulation:simulate",
    # estimation
    "fit": "stopwise.api:fit",
    "compare": "stopwise.api:compare",
    "fit_joint": "stopwise.joint:fit_joint",
    "recover": "stopwise.api:recover",
    "design": "stopwise.planning:design",
    # demo
    "demo_data": "stopwise.demo:demo_data",
    # saved results
    "load_result": "stopwise.saved:load_result",
    "write_report": "stopwise.report.write:write_report",
}

__all__ = [*sorted(_EXPORTS), "__version__", "contest"]


def __getattr__(name: str) -> _Any:
    if name == "contest":
        return _importlib.import_module("stopwise.contest")
    target = _EXPORTS.get(name)
    if target is None:
        raise AttributeError(f"module 'stopwise' has no attribute {name!r}")
    module_name, attribute = target.split(":")
    value = getattr(_importlib.import_module(module_name), attribute)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    """The public names only (``__all__``); helpers of this module start with "_"."""
    return sorted(__all__)
