"""Small symmetric-matrix helpers shared by the ML and Bayesian engines (the core: both
wings import it, it imports neither)."""

from __future__ import annotations

import numpy as np


def is_positive_definite(h: np.ndarray, rel_tol: float = 1e-10) -> bool:
    """All eigenvalues of the symmetrised H above rel_tol * max |eigenvalue| (and finite)."""
    if not np.all(np.isfinite(h)):
        return False
    eig = np.linalg.eigvalsh(0.5 * (h + h.T))
    return bool(eig.min() > rel_tol * max(np.abs(eig).max(), 1e-300))


def positive_part(matrix: np.ndarray) -> np.ndarray:
    """The symmetric part of ``matrix`` with its negative eigenvalues set to 0."""
    values, vectors = np.linalg.eigh(0.5 * (matrix + matrix.T))
    return (vectors * np.maximum(values, 0.0)) @ vectors.T


def symmetric_inverse(matrix: np.ndarray) -> np.ndarray:
    """The inverse of a symmetric positive definite matrix, symmetrised."""
    out = np.linalg.inv(0.5 * (matrix + matrix.T))
    return 0.5 * (out + out.T)
