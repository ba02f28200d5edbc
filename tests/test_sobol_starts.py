"""The multistart design's own Sobol generator (estimation/ml/sobol.py) against scipy's."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy.stats import qmc

from stopwise.estimation.ml.optimize import start_design
from stopwise.estimation.ml.sobol import MAX_DIM, direction_numbers, scrambled_sobol


@pytest.mark.parametrize("d", [1, 2, 3, 6, 13, 27, MAX_DIM])
def test_points_equal_scipys_scrambled_sobol_bit_for_bit(d: int) -> None:
    """Source: scipy.stats.qmc.Sobol (reference library), scramble=True, 30 bits."""
    for seed in (0, 1, 7, 2026):
        for n in (1, 2, 4, 16):
            expected = qmc.Sobol(d=d, scramble=True, seed=seed).random(n)
            assert np.array_equal(scrambled_sobol(d, n, seed), expected), (d, seed, n)


def test_direction_numbers_equal_scipys_unscrambled_sequence() -> None:
    """Unscrambled points: scipy.stats.qmc.Sobol(scramble=False) (reference library), and
    the textbook first points of dimensions 1-2, 0, 1/2, 3/4, 1/4 and 0, 1/2, 1/4, 3/4
    (Bratley & Fox 1988, from memory)."""
    v = direction_numbers(MAX_DIM)
    assert np.array_equal(v, qmc.Sobol(d=MAX_DIM, scramble=False)._sv.astype(np.int64))
    x, points = np.zeros(2, dtype=np.int64), []
    for g in range(4):
        points.append(x * 2.0**-30)
        x = x ^ v[:2, ((~g) & (g + 1)).bit_length() - 1]
    assert np.array_equal(np.array(points), [[0, 0], [0.5, 0.5], [0.75, 0.25], [0.25, 0.75]])


def test_beyond_the_table_the_points_are_scipys() -> None:
    d = MAX_DIM + 3
    expected = qmc.Sobol(d=d, scramble=True, seed=5).random(4)
    assert np.array_equal(scrambled_sobol(d, 4, 5), expected)


def test_start_design_keeps_its_starts_and_does_not_load_scipy_stats() -> None:
    z0 = np.array([0.3, -1.2, 0.5])
    u = qmc.Sobol(d=3, scramble=True, seed=11).random(4)[:3]
    expected = np.vstack([z0, z0 + 1.5 * (2.0 * u - 1.0)])
    assert np.array_equal(start_design(z0, 4, 11), expected)
    code = (
        "import sys, numpy as np\n"
        "from stopwise.estimation.ml.optimize import start_design\n"
        "start_design(np.zeros(2), 3, 0)\n"
        "print('scipy.stats' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_points_kept_per_seed_are_copies_and_other_seeds_differ() -> None:
    """The points of an integer seed are computed once and handed out as copies: changing a
    returned array does not change the next call's points (compared with scipy's, reference
    library); a generator as the seed still gives its own points."""
    first = scrambled_sobol(3, 8, 11)
    first[:] = -1.0
    expected = qmc.Sobol(d=3, scramble=True, seed=11).random(8)
    assert np.array_equal(scrambled_sobol(3, 8, 11), expected)
    assert np.array_equal(scrambled_sobol(3, 8, np.int64(11)), expected)
    assert not np.array_equal(scrambled_sobol(3, 8, 12), expected)
    fresh = [scrambled_sobol(3, 8, np.random.default_rng(5)) for _ in range(2)]
    assert np.array_equal(fresh[0], fresh[1])  # the same generator state gives the same points
