"""Rank statistics of simulation-based calibration (Talts, Betancourt, Simpson, Vehtari &
Gelman 2018, "Validating Bayesian inference algorithms with simulation-based calibration").

With L posterior draws per replication the rank of the true value, #{draws < truth}, is
uniform on 0..L when the sampler and likelihood are right and the draws are independent
(Talts et al. 2018, Theorem 1). Ranks are put in B equal bins of (L + 1) / B ranks; under
uniformity the bin counts of N replications are Multinomial(N, 1/B, ..., 1/B), each bin
Binomial(N, 1/B).

The 99% simultaneous band: every bin must lie in [lo, hi] with

  lo = binom.ppf(a, N, 1/B),  hi = binom.isf(a, N, 1/B),   a = (1 - 0.99) / (2 B),

so P(bin < lo) <= a and P(bin > hi) <= a for each bin, and by Bonferroni's inequality the
chance that any of the B bins leaves the band is at most 2 a B = 1%. (Talts et al. 2018 draw
marginal binomial 99% intervals; the Bonferroni correction for B bins is common practice,
no source.) ``band_coverage`` measures the band's simultaneous coverage by simulating
uniform-rank studies, as an independent check of the bound.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy import stats

BINS = 10
LEVEL = 0.99


def bin_counts(ranks: Sequence[int], kept: int, bins: int = BINS) -> np.ndarray:
    """Counts of ranks 0..kept in ``bins`` equal bins (kept + 1 must be a multiple of bins)."""
    if (kept + 1) % bins:
        raise ValueError(f"{kept + 1} ranks do not split into {bins} equal bins")
    r = np.asarray(ranks, dtype=np.int64)
    if r.size and (r.min() < 0 or r.max() > kept):
        raise ValueError(f"ranks must lie in 0..{kept}")
    return np.bincount(r * bins // (kept + 1), minlength=bins)


def simultaneous_band(replications: int, bins: int = BINS, level: float = LEVEL) -> tuple[int, int]:
    """Bonferroni band [lo, hi] for ``bins`` Binomial(N, 1/bins) counts (module docstring)."""
    tail = (1.0 - level) / (2.0 * bins)
    p = 1.0 / bins
    return (
        int(stats.binom.ppf(tail, replications, p)),
        int(stats.binom.isf(tail, replications, p)),
    )


def inside_band(counts: np.ndarray, band: tuple[int, int]) -> bool:
    """Every bin count within [lo, hi]."""
    lo, hi = band
    return bool(np.all((counts >= lo) & (counts <= hi)))


def band_coverage(
    replications: int, studies: int, seed: int, bins: int = BINS, level: float = LEVEL
) -> float:
    """Share of ``studies`` simulated uniform-rank histograms (Multinomial(N, 1/bins)) whose
    bins all lie in the band: at least ``level`` up to simulation error if the band is right."""
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(replications, np.full(bins, 1.0 / bins), size=studies)
    lo, hi = simultaneous_band(replications, bins, level)
    return float(np.mean(np.all((counts >= lo) & (counts <= hi), axis=1)))


def chi_square_p(counts: np.ndarray) -> float:
    """Pearson's chi-square test of equal bin probabilities (bins - 1 df), p-value."""
    return float(stats.chisquare(counts).pvalue)


def rank_of_truth(draws: np.ndarray, truth: float) -> int:
    """#{draws < truth}: the SBC rank, 0..len(draws)."""
    return int(np.sum(np.asarray(draws) < truth))


def thinned(draws_by_chain: np.ndarray, thin: int, kept: int) -> np.ndarray:
    """Every ``thin``-th draw of each chain (chain after chain), the first ``kept``."""
    x = np.asarray(draws_by_chain)[:, ::thin].reshape(-1)
    if x.size < kept:
        raise ValueError(f"{x.size} thinned draws, {kept} needed")
    return x[:kept]
