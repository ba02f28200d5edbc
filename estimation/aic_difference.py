"""Standard error of an AIC difference from per-cluster log-likelihoods.

With G clusters (subjects) and d_g = ln L_A,g - ln L_B,g at the two estimates,

    ΔAIC_AB = AIC_A - AIC_B = 2 (k_A - k_B) - 2 sum_g d_g,

a sum of G pointwise (per-cluster) contributions -2 d_g plus a constant. Treating the
clusters as independent draws, its standard error is

    SE(ΔAIC_AB) = sqrt(G) * sd(-2 d) = 2 sqrt(G) sd(d),   sd with divisor G,

the same construction as the SE of an elpd difference (Vehtari, Gelman & Gabry 2017,
eq. 24, from memory; they use divisor G - 1). Divisor G keeps the exact link to Vuong's
(1989) statistic: with his AIC-type correction, Z_AIC = (sum_g d_g - (k_A - k_B)) /
(sqrt(G) sd(d)) = -ΔAIC_AB / SE(ΔAIC_AB); with equal k it is Vuong's uncorrected Z.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def delta_aic_se(ll_a: Sequence[float], ll_b: Sequence[float]) -> float:
    """2 sqrt(G) sd(d), d_g = ln L_A,g - ln L_B,g (module docstring); NaN below 2 clusters
    or when the two vectors differ in length or hold a non-finite value."""
    a = np.asarray(ll_a, dtype=float)
    b = np.asarray(ll_b, dtype=float)
    if a.shape != b.shape or a.ndim != 1 or len(a) < 2:
        return float("nan")
    d = a - b
    if not np.all(np.isfinite(d)):
        return float("nan")
    return float(2.0 * np.sqrt(len(d)) * d.std(ddof=0))


def delta_aic_ses(
    cluster_logliks: Sequence[Sequence[float]], aics: Sequence[float], usable: Sequence[bool]
) -> list[float]:
    """For every model m, SE(AIC_m - AIC_best) with best = the smallest AIC (0 for the best
    model itself); NaN where model m or the best one is not usable (not converged)."""
    best = int(np.nanargmin(np.asarray(aics, dtype=float)))
    out = []
    for m, ll in enumerate(cluster_logliks):
        if not (usable[m] and usable[best]):
            out.append(float("nan"))
        elif m == best:
            out.append(0.0)
        else:
            out.append(delta_aic_se(ll, cluster_logliks[best]))
    return out
