"""A plain numpy/scipy fit of ``crra+myopic+logit``, written as a researcher would without
stopwise: the baseline process of bench_fit.py (it imports no stopwise code).

Model (the myopic rule with CRRA utility and logit noise; bank b = start + step * gain):

    diff = p u(b + gain) + (1 - p) u(keep * b) - u(b),   u(x) = (x^(1-r) - 1) / (1 - r)
    P(draw) = 1 / (1 + exp(-precision * diff))

Fit: scipy BFGS on (r, log precision) from (0, 0); standard errors from the inverse of a
central-difference Hessian of the negative log-likelihood in (r, precision).
Usage: ``python benchmarks/plain_fit.py DATA.csv`` prints a JSON line.
"""

from __future__ import annotations

import json
import sys

import numpy as np
import pandas as pd
from scipy import optimize, special


def crra(x: np.ndarray, r: float) -> np.ndarray:
    """(x^(1-r) - 1) / (1 - r) for x >= 0 and r < 1 (x = 0 gives -1 / (1 - r))."""
    with np.errstate(divide="ignore"):
        return np.expm1((1.0 - r) * np.log(x)) / (1.0 - r)


def myopic_rows_loglik(
    r: float,
    precision: float,
    p: np.ndarray,
    gain: np.ndarray,
    bank: np.ndarray,
    keep: np.ndarray,
    draw: np.ndarray,
) -> np.ndarray:
    """log P(action) of every row (module docstring)."""
    diff = p * crra(bank + gain, r) + (1.0 - p) * crra(keep * bank, r) - crra(bank, r)
    return np.where(
        draw > 0.5, special.log_expit(precision * diff), special.log_expit(-precision * diff)
    )


def rows_from_csv(path: str) -> dict[str, np.ndarray]:
    frame = pd.read_csv(path)
    n = len(frame)
    start = frame["start"].to_numpy(float) if "start" in frame else np.zeros(n)
    keep = frame["bust_keep"].to_numpy(float) if "bust_keep" in frame else np.zeros(n)
    gain = frame["gain"].to_numpy(float)
    return {
        "p": frame["p_survive"].to_numpy(float),
        "gain": gain,
        "bank": start + frame["step"].to_numpy(float) * gain,
        "keep": keep,
        "draw": (frame["action"] == "draw").to_numpy(float),
    }


def numerical_hessian(f, x: np.ndarray, h: float = 1e-4) -> np.ndarray:
    """Central differences: H_jk = (f(x+e_j+e_k) - f(x+e_j-e_k) - f(x-e_j+e_k)
    + f(x-e_j-e_k)) / (4 h_j h_k), steps h_j = h max(1, |x_j|)."""
    k = len(x)
    steps = h * np.maximum(1.0, np.abs(x))
    out = np.zeros((k, k))
    for j in range(k):
        for m in range(j, k):
            ej, em = np.eye(k)[j] * steps[j], np.eye(k)[m] * steps[m]
            value = f(x + ej + em) - f(x + ej - em) - f(x - ej + em) + f(x - ej - em)
            out[j, m] = out[m, j] = value / (4.0 * steps[j] * steps[m])
    return out


def main(path: str) -> dict[str, object]:
    rows = rows_from_csv(path)

    def negll_natural(x: np.ndarray) -> float:
        return -float(myopic_rows_loglik(x[0], x[1], **rows).sum())

    res = optimize.minimize(
        lambda z: negll_natural(np.array([z[0], np.exp(z[1])])),
        np.zeros(2),
        method="BFGS",
        options={"gtol": 1e-6},
    )
    estimate = np.array([res.x[0], np.exp(res.x[1])])
    cov = np.linalg.inv(numerical_hessian(negll_natural, estimate))
    return {
        "r": float(estimate[0]),
        "precision": float(estimate[1]),
        "se": np.sqrt(np.diag(cov)).tolist(),
        "loglik": -float(res.fun),
        "converged": bool(res.success),
    }


if __name__ == "__main__":
    print(json.dumps(main(sys.argv[1])))
