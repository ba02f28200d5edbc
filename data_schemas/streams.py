"""What a participant had seen before each trial whose odds were not told (``odds_known`` 0).

A learning stream is one subject's untold trials with the same true ``p_survive`` (the
participant is assumed to tell such tasks apart, not to know their odds), taken in the order
of the trial ids. For trial t of a stream, with S_j successful draws and F_j in {0, 1} busts
on trial j:  seen_success(t) = sum_{j < t} S_j,  seen_fail(t) = sum_{j < t} F_j.
Trials whose odds were told get 0 and 0.
"""

from __future__ import annotations

import numpy as np
import pandas as pd


def trial_outcome_counts(
    trial: np.ndarray, draw: np.ndarray, bust: np.ndarray, n_trials: int
) -> tuple[np.ndarray, np.ndarray]:
    """(S_t, F_t) per global trial: successful draws and busts (rows: draw flag, bust flag)."""
    success = np.bincount(trial, weights=draw * (1.0 - bust), minlength=n_trials)
    fail = np.bincount(trial, weights=bust, minlength=n_trials)
    return success, fail


def seen_before(
    stream: np.ndarray, untold: np.ndarray, success: np.ndarray, fail: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per trial (global index, already in subject-then-trial-id order): the sums of S and F
    over earlier untold trials of the same ``stream`` key; 0 for told trials."""
    frame = pd.DataFrame(
        {
            "stream": stream,
            "s": np.where(untold, success, 0.0),
            "f": np.where(untold, fail, 0.0),
        }
    )
    grouped = frame.groupby("stream", sort=False)
    seen_s = grouped["s"].cumsum().to_numpy() - frame["s"].to_numpy()
    seen_f = grouped["f"].cumsum().to_numpy() - frame["f"].to_numpy()
    return np.where(untold, seen_s, 0.0), np.where(untold, seen_f, 0.0)
