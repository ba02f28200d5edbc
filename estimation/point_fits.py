"""The maximum-likelihood fits a Bayesian run starts from, handed in by its caller.

A pooled Bayesian fit starts at the pooled ML estimate with its covariance as the initial
inverse mass matrix; a hierarchical one starts every subject near its own ML estimate. The
Bayes wing (estimation/bayes/) never imports the ML wing (estimation/ml/; tests/test_package.py
checks it), so whoever starts a Bayesian fit passes the two ML entry points in as a
``PointFits``: the face (stopwise.api) passes ``stopwise.estimation.ml.point_fits.ML_POINT_FITS``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class PointFits:
    """``pooled(model, data, se=..., formulas=..., progress=...)`` returns a fit with
    ``params``, ``z``, ``cov_z`` and ``converged``; ``by_subject(model, data, se=...)``
    returns per-subject fits with ``fits`` ((label, fit) pairs), ``flags`` and ``params``."""

    pooled: Callable[..., Any]
    by_subject: Callable[..., Any]


def require_point_fits(point_fits: PointFits | None, purpose: str) -> PointFits:
    """``point_fits``, or a clear error naming what needed them."""
    if point_fits is None:
        raise ValueError(
            f"{purpose} starts from maximum-likelihood fits: pass point_fits="
            "stopwise.estimation.ml.point_fits.ML_POINT_FITS (stopwise.fit does), or start "
            "elsewhere (init='start' or a mapping of values for a pooled fit)"
        )
    return point_fits
