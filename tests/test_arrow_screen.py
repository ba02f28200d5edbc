"""The Arrow fast path for Parquet parts (data_schemas/arrow_screen.py, counts.count_keys)
against the full validator and the row-level count reduction on the same folders.

References: the full pandas validator (``check_part`` on every part: ``fast=False``) and
``count_rows`` on its clean rows, both separate code paths; the row-level log-likelihood of
the same rows (identity sum_i ll_i = sum_u n_u ll_u: common practice, no source). The data
are invented (a small numpy generator below), never real participants.
"""

from __future__ import annotations

import itertools
import json
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.data_schemas.arrow_screen import screen_part
from stopwise.data_schemas.partitioned import check_part, list_parts
from stopwise.data_schemas.validate import check_source
from stopwise.estimation.ml import counts as K
from stopwise.estimation.ml.count_tables import MERGE_CHUNK
from stopwise.partitioned import validate_parts

CUTS = (0.23, 0.5, 0.77)  # part boundaries as shares of the rows (they fall inside trials)


def _clean_frame(n_subjects: int = 6, n_trials: int = 8, seed: int = 3) -> pd.DataFrame:
    """Valid decision rows of an invented stopping task: two survival chances, three gains,
    two starting banks, a bust share on every fourth trial; each trial stops at a random
    target unless a draw busts first."""
    rng = np.random.default_rng(seed)
    rows = []
    for s, t in itertools.product(range(n_subjects), range(1, n_trials + 1)):
        p, gain, start = (0.7, 0.9)[(s + t) % 2], 1.0 + t % 3, 2.0 * (s % 2)
        target = int(rng.integers(0, 6))
        for step in range(target + 1):
            bust = step < target and rng.random() > p
            action = "stop" if step == target else "draw"
            outcome = None if action == "stop" else ("bust" if bust else "success")
            rows.append(
                {
                    "subject": f"p{s:02d}",
                    "trial": t,
                    "step": step,
                    "p_survive": p,
                    "gain": gain,
                    "start": start,
                    "bust_keep": 0.25 if t % 4 == 0 else 0.0,
                    "action": action,
                    "outcome": outcome,
                    "bank": start + step * gain,
                }
            )
            if bust:
                break
    return pd.DataFrame(rows)


def _write(frame: pd.DataFrame, folder: Path, cuts: tuple[float, ...] = CUTS) -> list[str]:
    folder.mkdir()
    bounds = [0, *[int(c * len(frame)) for c in cuts], len(frame)]
    for k, (a, b) in enumerate(itertools.pairwise(bounds)):
        frame.iloc[a:b].to_parquet(folder / f"part-{k + 1:03d}.parquet", index=False)
    return list_parts(folder)


def _both(folder: Path, **options: object) -> tuple[dict, dict]:
    fast = validate_parts(folder, fast=True, **options).to_dict()
    full = validate_parts(folder, fast=False, **options).to_dict()
    return fast, full


def _row(frame: pd.DataFrame, share: float) -> int:
    return int(share * len(frame))


def _set(column: str, value: object, share: float = 0.5) -> Callable[[pd.DataFrame], None]:
    def change(frame: pd.DataFrame) -> None:
        if isinstance(value, str) and frame[column].dtype != object:
            frame[column] = frame[column].astype(str)  # a text column, as a writer would make
        elif isinstance(value, float) and frame[column].dtype.kind == "i":
            frame[column] = frame[column].astype(float)
        frame.loc[_row(frame, share), column] = value

    return change


def _draw_row(frame: pd.DataFrame) -> int:
    return int(np.flatnonzero((frame["action"] == "draw").to_numpy())[3])


def _stop_row(frame: pd.DataFrame) -> int:
    return int(np.flatnonzero((frame["action"] == "stop").to_numpy())[5])


def _shift_step(frame: pd.DataFrame) -> None:
    frame.loc[_draw_row(frame) + 1, "step"] += 2


def _duplicate_draw(frame: pd.DataFrame) -> pd.DataFrame:
    i = _draw_row(frame)
    return pd.concat([frame.iloc[: i + 1], frame.iloc[i : i + 1], frame.iloc[i + 1 :]])


def _after_stop(frame: pd.DataFrame) -> pd.DataFrame:
    i = _stop_row(frame)
    extra = frame.iloc[i : i + 1].assign(step=frame.loc[i, "step"] + 1, action="draw")
    extra["outcome"] = "success"
    extra["bank"] = extra["start"] + extra["step"] * extra["gain"]
    return pd.concat([frame.iloc[: i + 1], extra, frame.iloc[i + 1 :]])


def _drop_stop(frame: pd.DataFrame) -> pd.DataFrame:
    i = _stop_row(frame)
    if frame.loc[i, "step"] == 0:
        i = int(np.flatnonzero(((frame["action"] == "stop") & (frame["step"] > 0)).to_numpy())[2])
    return frame.drop(index=i)


def _move_trial(frame: pd.DataFrame) -> pd.DataFrame:
    """A whole trial moved to the end: its key shows up apart from its neighbours (valid:
    the validator sorts rows; the screen leaves such a part to it)."""
    key = frame.loc[_row(frame, 0.4), ["subject", "trial"]]
    mask = ((frame["subject"] == key["subject"]) & (frame["trial"] == key["trial"])).to_numpy()
    return pd.concat([frame[~mask], frame[mask]])


def _split_trial(frame: pd.DataFrame) -> pd.DataFrame:
    """A trial's rows in two blocks with another trial between them (a repeated key)."""
    i = _draw_row(frame)
    other = frame.iloc[-3:]
    return pd.concat([frame.iloc[: i + 1], other, frame.iloc[i + 1 : -3]])


def _reverse_steps(frame: pd.DataFrame) -> pd.DataFrame:
    i = _draw_row(frame)
    j = i + 1
    return pd.concat([frame.iloc[:i], frame.iloc[[j, i]], frame.iloc[j + 1 :]])


def _at(
    column: str, row: Callable[[pd.DataFrame], int], value: object
) -> Callable[[pd.DataFrame], None]:
    """Set one cell, in the row that ``row`` picks."""

    def change(frame: pd.DataFrame) -> None:
        frame[column] = frame[column].mask(frame.index == row(frame), value)

    return change


def _after_draw(frame: pd.DataFrame) -> int:
    return _draw_row(frame) + 1


def _with(column: str, value: object) -> Callable[[pd.DataFrame], pd.DataFrame]:
    return lambda frame: frame.assign(**{column: value})


def _trial_level(frame: pd.DataFrame) -> pd.DataFrame:
    ends = frame.groupby(["subject", "trial"], sort=False).tail(1)
    return ends[["subject", "trial", "p_survive", "gain"]].assign(
        draws=ends["step"].to_numpy(), busted=(ends["outcome"] == "bust").to_numpy().astype(int)
    )


# Each case: a change to the clean rows (in place, or returning new rows) and whether the
# result is still valid. Every kind of problem the validator knows for stopping data in a
# Parquet part appears, plus valid parts outside the screen's cover (left to the validator).
CASES: dict[str, tuple[Callable[[pd.DataFrame], object], bool]] = {
    "missing p_survive": (_set("p_survive", np.nan), False),
    "missing subject": (_set("subject", None), False),
    "blank subject": (_set("subject", "  "), False),
    "missing action": (_set("action", None), False),
    "missing trial": (_set("trial", np.nan), False),
    "p_survive 1.5": (_set("p_survive", 1.5), False),
    "p_survive 0": (_set("p_survive", 0.0), False),
    "p_survive 1": (_set("p_survive", 1.0), False),
    "gain 0": (_set("gain", 0.0), False),
    "gain inf": (_set("gain", np.inf), False),
    "trial 2^53": (_set("trial", 2**53), False),
    "trial -2^53": (_set("trial", -(2**53)), False),
    "fractional step": (_set("step", 1.5), False),
    "negative step": (_set("step", -1), False),
    "step beyond the size limit": (_set("step", 20_001), False),
    "start inf": (_set("start", np.inf), False),
    "missing start": (_set("start", np.nan), False),
    "bust_keep 1.5": (_set("bust_keep", 1.5), False),
    "unknown action": (_set("action", "Stop"), False),
    "unknown outcome": (_set("outcome", "boom"), False),
    "outcome after stop": (_at("outcome", _stop_row, "bust"), False),
    "draw without outcome": (_at("outcome", _draw_row, None), False),
    "step gap": (_shift_step, False),
    "duplicate row": (_duplicate_draw, False),
    "row after the end": (_after_stop, False),
    "unfinished trial": (_drop_stop, False),
    "bank mismatch": (_at("bank", _after_draw, 0.5), False),
    "p_survive changes in a trial": (_at("p_survive", _after_draw, 0.8), False),
    "gain changes in a trial": (_at("gain", _after_draw, 9.0), False),
    "start changes in a trial": (_at("start", _after_draw, 7.0), False),
    "a trial in two blocks": (_split_trial, False),
    "text in step": (_set("step", "two"), False),
    "missing column gain": (lambda f: f.drop(columns="gain"), False),
    "list in a covariate cell": (
        lambda f: f.assign(history=[[i, 1] for i in range(len(f))]),
        False,
    ),
    "contest rows without group": (_with("task", "contest"), False),
    "pool without pool_bad": (_with("pool_size", 10), False),
    "order on solo rows": (_with("order", 1), False),
    "trial-level part": (_trial_level, True),
    "blank outcome after stops": (lambda f: f.assign(outcome=f["outcome"].fillna("")), True),
    "trial moved to the end": (_move_trial, True),
    "steps listed in reverse": (_reverse_steps, True),
    "spaces around a name": (lambda f: f.rename(columns={"gain": " gain"}), True),
    "numbers as text": (lambda f: f.assign(trial=f["trial"].astype(str)), True),
    "integer subjects": (lambda f: f.assign(subject=f["subject"].str[1:].astype(int)), True),
    "covariate column": (_with("treatment", "low"), True),
    "without bank, start, bust_keep": (
        lambda f: f.drop(columns=["bank", "start", "bust_keep"]),
        True,
    ),
    "float trial ids": (lambda f: f.assign(trial=f["trial"].astype(float)), True),
}


def _apply(change: Callable[[pd.DataFrame], object]) -> pd.DataFrame:
    frame = _clean_frame()
    result = change(frame)
    frame = result if isinstance(result, pd.DataFrame) else frame
    return frame.reset_index(drop=True)


@pytest.mark.parametrize("name", list(CASES))
def test_screen_reports_exactly_what_the_validator_reports(tmp_path: Path, name: str) -> None:
    change, valid = CASES[name]
    frame = _apply(change)
    _write(frame, tmp_path / "parts")
    fast, full = _both(tmp_path / "parts")
    assert fast == full
    assert fast["ok"] is valid, fast["problems"][:3]
    if not valid:
        assert all(p["file"].endswith(".parquet") for p in fast["problems"] if p["line"])


@pytest.mark.parametrize(
    "name",
    ["integer subjects", "covariate column", "without bank, start, bust_keep", "float trial ids"],
)
def test_valid_variants_inside_the_cover_take_the_fast_path(tmp_path: Path, name: str) -> None:
    parts = _write(_apply(CASES[name][0]), tmp_path / "parts")
    assert all(screen_part(parts, k) is not None for k in range(len(parts)))


def test_clean_parts_take_the_fast_path_across_seams(tmp_path: Path) -> None:
    frame = _clean_frame()
    parts = _write(frame, tmp_path / "parts")
    seams = [_row(frame, c) for c in CUTS]
    key = frame[["subject", "trial"]]
    assert any((key.loc[i] == key.loc[i - 1]).all() for i in seams), "cut inside a trial"
    for k in range(len(parts)):
        screened = screen_part(parts, k)
        assert screened is not None, f"part {k} left to the validator"
        reference, clean = check_part(parts, k)
        assert clean is not None and screened.check.n_rows == reference.n_rows == len(clean)
        assert screened.check.trials == reference.trials
        assert screened.check.subjects == reference.subjects
        assert screened.check.values == reference.values
        pd.testing.assert_frame_equal(
            K.merge_counts([K.count_keys(screened.keys)]), K.merge_counts([K.count_rows(clean)])
        )
    fast, full = _both(tmp_path / "parts")
    assert fast == full and fast["ok"] and fast["n_rows"] == len(frame)
    assert fast["stats"]["trials"] == frame.groupby(["subject", "trial"]).ngroups


def test_a_trial_spanning_three_parts(tmp_path: Path) -> None:
    """One long trial cut twice: the middle part is all continuation (its rows belong to
    the part holding the trial's first row)."""
    frame = _clean_frame(n_subjects=2, n_trials=3)
    long_trial = pd.DataFrame(
        {
            "subject": "p99",
            "trial": 1,
            "step": np.arange(40),
            "p_survive": 0.9,
            "gain": 1.0,
            "start": 0.0,
            "bust_keep": 0.0,
            "action": ["draw"] * 39 + ["stop"],
            "outcome": ["success"] * 39 + [None],
            "bank": np.arange(40, dtype=float),
        }
    )
    tail = _clean_frame(2, 2, seed=9).assign(subject=lambda f: "q" + f["subject"])
    frame = pd.concat([frame, long_trial, tail], ignore_index=True)
    first = len(frame) - len(long_trial) - 14  # the long trial starts 14 rows later
    cuts = tuple(x / len(frame) for x in (first + 24, first + 30, first + 44))
    parts = _write(frame, tmp_path / "parts", cuts)
    assert screen_part(parts, 0) is not None  # holds the trial's first row, takes the rest
    fast, full = _both(tmp_path / "parts")
    assert fast == full and fast["ok"] and fast["n_rows"] == len(frame)
    pieces = [K.check_and_count_part(parts, k, count=True)[1] for k in range(len(parts))]
    whole = K.count_rows(check_source(frame)[1])
    pd.testing.assert_frame_equal(
        K.merge_counts([p for p in pieces if p is not None]), K.merge_counts([whole])
    )
    broken = frame.copy()
    broken.loc[first + 14 + 27, "step"] = 99  # a defect in the all-continuation part
    parts = _write(broken, tmp_path / "broken", cuts)
    fast, full = _both(tmp_path / "broken")
    assert fast == full and not fast["ok"]
    assert {p["file"] for p in fast["problems"]} == {parts[2]}


def test_censored_trials_when_allowed(tmp_path: Path) -> None:
    frame = _drop_stop(_clean_frame()).reset_index(drop=True)
    _write(frame, tmp_path / "parts")
    fast, full = _both(tmp_path / "parts", allow_censored=True)
    assert fast == full and fast["ok"]
    assert _both(tmp_path / "parts")[0]["counts"] == {"unfinished_trial": 1}
    _write(_after_stop(_clean_frame()).reset_index(drop=True), tmp_path / "after")
    fast, full = _both(tmp_path / "after", allow_censored=True)
    assert fast == full and fast["counts"] == {"row_after_end": 1}


def test_unreadable_part_and_a_forced_kind(tmp_path: Path) -> None:
    parts = _write(_clean_frame(), tmp_path / "parts")
    Path(parts[1]).write_bytes(b"PAR1 not really a parquet file")
    fast, full = _both(tmp_path / "parts")
    assert fast == full and fast["counts"]["not_a_table"] == 1
    assert [p["file"] for p in fast["problems"] if p["kind"] == "not_a_table"] == [parts[1]]
    _write(_clean_frame(), tmp_path / "other")
    for kind in ("trials", "lottery", "decisions"):
        assert _both(tmp_path / "other", kind=kind)[0] == _both(tmp_path / "other", kind=kind)[1]


def test_counts_from_arrays_equal_the_row_loglik(tmp_path: Path) -> None:
    """sum_u n_u ll_u(theta) on the fast counts equals sum_i ll_i(theta) on the rows to 1e-9
    (relative), at the model's start and two other points."""
    frame = _clean_frame(n_subjects=10, n_trials=12, seed=11)
    parts = _write(frame, tmp_path / "parts")
    pieces = [K.check_and_count_part(parts, k, count=True)[1] for k in range(len(parts))]
    counts = K.merge_counts(pieces)
    assert counts[K.COUNT_COLUMN].sum() == len(frame) and len(counts) < len(frame)
    model = stopwise.model("crra+myopic+logit")
    rows = K.row_problem(model, check_source(frame)[1])
    reduced, _, _ = K.counts_problem(model, counts)
    for shift in (0.0, 0.3, -0.4):
        z = rows.z0 + shift
        ll_rows, ll_counts = K.total_loglik(rows, z), K.total_loglik(reduced, z)
        assert abs(ll_rows - ll_counts) <= 1e-9 * max(1.0, abs(ll_rows))


PROBE = """
import contextlib, io, json, sys
from stopwise.cli import main
out = io.StringIO()
with contextlib.redirect_stdout(out), contextlib.redirect_stderr(out):
    code = main(sys.argv[1:])
print(json.dumps({"code": code, "jax": "jax" in sys.modules, "out": out.getvalue()}))
"""


def test_validate_command_on_a_folder_starts_without_jax(tmp_path: Path) -> None:
    parts = _write(_clean_frame(), tmp_path / "parts")
    argv = ["validate", str(tmp_path / "parts"), "--workers", "0"]
    done = subprocess.run(
        [sys.executable, "-c", PROBE, *argv], capture_output=True, text=True, timeout=300
    )
    result = json.loads(done.stdout.strip().splitlines()[-1])
    assert result["code"] == 0 and "OK" in result["out"] and not result["jax"]
    Path(parts[2]).write_bytes(b"PAR1 broken")
    done = subprocess.run(
        [sys.executable, "-c", PROBE, *argv], capture_output=True, text=True, timeout=300
    )
    result = json.loads(done.stdout.strip().splitlines()[-1])
    assert result["code"] == 2 and parts[2] in result["out"] and not result["jax"]


def test_merging_many_count_tables_in_chunks_equals_one_merge() -> None:
    """merge_counts sums MERGE_CHUNK tables at a time; the reference is one groupby over all
    of them stacked (merge_once)."""
    frame = _clean_frame(n_subjects=10, n_trials=12, seed=4)
    pieces = [K.count_rows(frame.iloc[a : a + 7]) for a in range(0, len(frame), 7)]
    assert len(pieces) > 2 * MERGE_CHUNK
    pd.testing.assert_frame_equal(K.merge_counts(pieces), K.merge_once(pieces))
    pd.testing.assert_frame_equal(
        K.merge_counts(iter(pieces)), K.merge_counts([K.count_rows(frame)])
    )
