"""Shared set-up of the examples: the command line (--small for a quick check, --out for
the output folder) and the invented scenario's design.

The scenario, used by every example and invented for them: an apiary game. A player
inspects a hive frame by frame; each frame harvested adds `gain` jars of honey, and with
chance 1 - p_survive the colony takes fright and swarms, and the jars gathered in that
round are lost. Contest rounds pair beekeepers: the bigger harvest wins a ribbon (the
prize). All data are simulated by stopwise itself; no real person appears anywhere.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import numpy as np
import pandas as pd

from stopwise.cli import host_device_flags

# Bayesian chains run in parallel on one CPU device each; JAX reads this before it starts.
# The command line's own rule for --chains (flags already set are kept; stopwise.cli does
# not import JAX).
_device_flags = host_device_flags(os.environ.get("XLA_FLAGS"), chains=4)
if _device_flags is not None:
    os.environ["XLA_FLAGS"] = _device_flags


def arguments(description: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("--small", action="store_true", help="tiny settings (the test suite)")
    parser.add_argument("--out", default="examples_output", help="output folder")
    args = parser.parse_args()
    args.out = Path(args.out)
    args.out.mkdir(parents=True, exist_ok=True)
    return args


def hive_design(keepers: int, rounds: int, p_survive=(0.8, 0.9), gain: float = 1.0) -> pd.DataFrame:
    """One row per solo round: keeper k01.., round 1.., the swarm-free chance cycling
    through p_survive, `gain` jars per frame."""
    p = np.resize(np.asarray(p_survive, dtype=float), rounds)
    return pd.DataFrame(
        {
            "subject": np.repeat([f"k{i + 1:02d}" for i in range(keepers)], rounds),
            "trial": np.tile(np.arange(1, rounds + 1), keepers),
            "p_survive": np.tile(p, keepers),
            "gain": gain,
        }
    )
