"""Merging count tables from their codes (estimation/ml/count_tables.py) against the
reference, one pandas groupby over the stacked label columns (counts.merge_once): an
independent computation of the same sums n_u. Checked where the shortcut could go wrong:
subjects and conditions shared by several parts but seen in a different order in each, a
subject in one part only, both summing paths (dense bincount and sort), and frames mixed
with code tables."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from test_arrow_screen import _clean_frame, _write

from stopwise.data_schemas.arrow_screen import screen_part
from stopwise.data_schemas.partitioned import check_part
from stopwise.estimation.ml import count_tables as T
from stopwise.estimation.ml import counts as K

CONDITIONS = [(0.9, 1.0, 0.0, 0.0), (0.8, 2.0, 5.0, 0.0), (0.7, 1.5, 0.0, 0.5)]


def _count_frame(rng: np.random.Generator, subjects: list, n_keys: int) -> pd.DataFrame:
    """A count frame of distinct keys drawn at random (labels in a shuffled order)."""
    rows = set()
    while len(rows) < n_keys:
        cond = CONDITIONS[rng.integers(len(CONDITIONS))]
        action = ("draw", "stop")[rng.integers(2)]
        outcome = ("", "success", "bust")[rng.integers(3)] if action == "draw" else ""
        subject = subjects[rng.integers(len(subjects))]
        rows.add((subject, *cond, int(rng.integers(0, 12)), action, outcome))
    frame = pd.DataFrame(sorted(rows, key=str), columns=list(K.KEY_COLUMNS))
    frame = frame.sample(frac=1.0, random_state=int(rng.integers(1 << 30)))
    frame[K.COUNT_COLUMN] = rng.integers(1, 50, len(frame))
    return frame.reset_index(drop=True)


def _parts(labels: list, seed: int = 0) -> list[pd.DataFrame]:
    rng = np.random.default_rng(seed)
    parts = []
    for k in range(2 * T.MERGE_CHUNK + 3):  # more than two chunks of tables
        chosen = list(rng.permutation(np.asarray(labels, dtype=object))[: 2 + k % 5])
        parts.append(_count_frame(rng, chosen, n_keys=int(rng.integers(5, 40))))
    return parts


@pytest.mark.parametrize("labels", [["s1", "s2", "s3", "s4", "s9"], [3, 1, 7, 12, 40]])
@pytest.mark.parametrize("dense", [True, False])
def test_merge_from_codes_equals_one_groupby(
    labels: list, dense: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    if not dense:  # the sort-and-reduce path instead of np.bincount
        monkeypatch.setattr(T, "DENSE_CELLS_PER_ROW", 0)
    parts = _parts(labels)
    reference = K.merge_once(parts)
    merged = K.merge_counts(parts)
    pd.testing.assert_frame_equal(merged, reference)
    assert merged[K.COUNT_COLUMN].sum() == sum(p[K.COUNT_COLUMN].sum() for p in parts)


def test_code_tables_and_frames_merge_alike() -> None:
    parts = _parts(["a", "b", "c", "d"], seed=3)
    tables = [T.table_from_frame(p) for p in parts]
    mixed = [t if k % 2 else p for k, (t, p) in enumerate(zip(tables, parts))]
    pd.testing.assert_frame_equal(K.merge_counts(mixed), K.merge_counts(parts))
    assert sum(len(t) for t in tables) == sum(len(p) for p in parts)


def test_one_table_round_trips_to_its_sorted_frame() -> None:
    frame = _parts(["x", "y"], seed=5)[7]
    expected = frame.sort_values(list(K.KEY_COLUMNS)).reset_index(drop=True)
    pd.testing.assert_frame_equal(T.table_frame(T.table_from_frame(frame)), expected)


def test_an_unknown_action_label_is_refused() -> None:
    frame = _parts(["x"], seed=1)[0]
    frame.loc[0, "action"] = "jump"
    with pytest.raises(ValueError, match="jump"):
        T.table_from_frame(frame)


def test_nothing_to_merge_is_an_error_not_an_empty_table() -> None:
    with pytest.raises(ValueError, match="no count tables"):
        K.merge_counts([])


@pytest.mark.parametrize("dense", [True, False])
@pytest.mark.parametrize("drop", [(), ("start", "bust_keep")])
def test_counts_of_a_part_with_constant_design_columns_equal_the_row_counts(
    tmp_path: Path, drop: tuple[str, ...], dense: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    """count_keys skips hashing a design column that is constant in the part (here start and
    bust_keep all 0, present or absent); its counts equal count_rows' on the validated rows,
    counted by np.bincount or (dense False) by sorting."""
    if not dense:
        monkeypatch.setattr(T, "DENSE_CELLS_PER_ROW", 0)
    frame = _clean_frame(n_subjects=8, n_trials=11, seed=2)
    frame = frame[frame["start"].eq(0.0) & frame["bust_keep"].eq(0.0)].drop(columns=list(drop))
    parts = _write(frame.reset_index(drop=True), tmp_path / "parts")
    for k in range(len(parts)):
        screened = screen_part(parts, k)
        assert screened is not None
        _, clean = check_part(parts, k)
        pd.testing.assert_frame_equal(
            K.merge_counts([K.count_keys(screened.keys)]), K.merge_counts([K.count_rows(clean)])
        )
