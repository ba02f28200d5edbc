"""A folder (or glob) of Parquet parts: validate, describe and fit part by part
(data_schemas/partitioned.py, stopwise/partitioned.py). The references are the same rows
as one file: the single-file validator and the row-level fit (separate code paths)."""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise import cli
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.partitioned import is_partitioned, list_parts
from stopwise.describe import describe as describe_rows
from stopwise.describe_parts import describe as describe_any
from stopwise.describe_parts import describe_parts
from stopwise.estimation.ml import problem as engine
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.partitioned import validate_parts

# Cut points fall inside trials, so trials span the seams between parts.
CUTS = (0.23, 0.5, 0.77)


def _rows() -> pd.DataFrame:
    design = stopping_design(16, 10, (0.7, 0.9), 1.0, seed=2)
    theta = {"r": 0.4, "precision": 3.0}
    frame = stopwise.model("crra+myopic+logit").simulate(theta, design, jax.random.PRNGKey(2))
    return frame.reset_index(drop=True)


def _write_parts(frame: pd.DataFrame, folder: Path) -> list[Path]:
    folder.mkdir()
    bounds = [0, *[int(c * len(frame)) for c in CUTS], len(frame)]
    paths = []
    for k, (a, b) in enumerate(itertools.pairwise(bounds)):
        path = folder / f"part-{k + 1:03d}.parquet"
        frame.iloc[a:b].to_parquet(path, index=False)
        paths.append(path)
    return paths


def _seam_rows(frame: pd.DataFrame) -> list[int]:
    """Rows where a part starts in the middle of a trial (their trial began in the part
    before)."""
    starts = [int(c * len(frame)) for c in CUTS]
    same = [
        s
        for s in starts
        if (frame.loc[s, ["subject", "trial"]] == frame.loc[s - 1, ["subject", "trial"]]).all()
    ]
    assert same, "the cut points should fall inside trials"
    return same


def test_parts_listed_in_name_order_and_globs(tmp_path: Path) -> None:
    paths = _write_parts(_rows(), tmp_path / "parts")
    (tmp_path / "parts" / "_SUCCESS").write_text("")
    assert list_parts(tmp_path / "parts") == [str(p) for p in paths]
    assert list_parts(str(tmp_path / "parts" / "part-00[12].parquet")) == [
        str(p) for p in paths[:2]
    ]
    assert is_partitioned(tmp_path / "parts") and not is_partitioned(paths[0])
    with pytest.raises(StopwiseInputError, match="no Parquet files"):
        list_parts(str(tmp_path / "nothing-*.parquet"))


def test_clean_parts_with_trials_across_seams_validate_like_one_file(tmp_path: Path) -> None:
    frame = _rows()
    _seam_rows(frame)
    _write_parts(frame, tmp_path / "parts")
    whole = stopwise.validate(frame)
    parts = validate_parts(tmp_path / "parts")
    assert whole.ok and parts.ok, parts.format()
    assert stopwise.validate(tmp_path / "parts").to_dict() == parts.to_dict()
    assert parts.n_rows == whole.n_rows == len(frame)
    assert parts.stats["trials"] == whole.stats["trials"] == 160
    assert parts.stats["subjects"] == whole.stats["subjects"] == 16


def test_defect_in_a_continued_trial_is_found_at_its_file_and_line(tmp_path: Path) -> None:
    frame = _rows()
    seam = _seam_rows(frame)[0]
    bad = frame.copy()
    bad.loc[seam, "step"] = bad.loc[seam, "step"] + 5  # breaks the trial's step sequence
    paths = _write_parts(bad, tmp_path / "parts")
    whole = stopwise.validate(bad)
    parts = validate_parts(tmp_path / "parts")
    assert not parts.ok and parts.counts == whole.counts
    starts = [0, *[int(c * len(frame)) for c in CUTS]]
    k = starts.index(seam)
    located = [(p.file, p.line) for p in parts.problems if p.file == str(paths[k])]
    assert (str(paths[k]), 2) in located  # first row of that part = line 2


def test_cli_names_the_third_file_and_writes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    frame = _rows()
    paths = _write_parts(frame, tmp_path / "parts")
    third = pd.read_parquet(paths[2])
    third.loc[4, "action"] = "jump"
    third.to_parquet(paths[2], index=False)
    code = cli.main(["validate", str(tmp_path / "parts"), "--workers", "0"])
    err = capsys.readouterr().err
    assert code == 2
    assert f"{paths[2]}:6: column 'action': found 'jump'" in err
    assert str(paths[0]) not in err and str(paths[1]) not in err
    problems = [line for line in err.splitlines() if line.lstrip().startswith(str(paths[2]))]
    out = tmp_path / "fit.json"
    argv = ["fit", str(tmp_path / "parts"), "--model", "crra+myopic+logit", "--json", str(out)]
    code = cli.main([*argv, "--workers", "0", "--no-progress"])
    fit_err = capsys.readouterr().err
    assert code == 2 and not out.exists()
    # the fit validates every part as it counts: it refuses with validate's own problem lines
    assert problems and all(line in fit_err for line in problems)


def test_fit_on_parts_uses_counts_and_matches_the_row_fit(tmp_path: Path) -> None:
    frame = _rows()
    _write_parts(frame, tmp_path / "parts")
    by_rows = stopwise.fit("crra+myopic+logit", frame, se="robust", starts=1, progress=False)
    by_parts = stopwise.fit(
        "crra+myopic+logit", tmp_path / "parts", se="robust", starts=1, progress=False, workers=0
    )
    assert any("fitted on counts" in n for n in by_parts.notes)
    assert by_parts.n_obs == by_rows.n_obs == len(frame)
    assert abs(by_parts.loglik - by_rows.loglik) < 1e-8
    np.testing.assert_allclose(by_parts.table.estimate, by_rows.table.estimate, rtol=1e-6)
    np.testing.assert_allclose(by_parts.table.se, by_rows.table.se, rtol=1e-5)


def test_a_second_fit_of_a_folder_reuses_the_model_and_its_programs(tmp_path: Path) -> None:
    """Refits of one folder by spec string share one Model (api.model_for_data), so the
    second fit neither traces nor compiles again, and gives the same numbers."""
    _write_parts(_rows(), tmp_path / "parts")
    options = {"se": "robust", "starts": 1, "progress": False, "workers": 0}
    first = stopwise.fit("crra+myopic+logit", tmp_path / "parts", **options)
    step_programs = engine.value_grad_hess._cache_size()
    again = stopwise.fit("crra+myopic+logit", tmp_path / "parts", **options)
    assert engine.value_grad_hess._cache_size() == step_programs
    assert again.extras["layout"].model is first.extras["layout"].model
    np.testing.assert_array_equal(again.z, first.z)
    np.testing.assert_array_equal(again.params["se"], first.params["se"])


def test_fit_that_needs_rows_says_so_and_falls_back(tmp_path: Path) -> None:
    frame = _rows()
    _write_parts(frame, tmp_path / "parts")
    by_subject = stopwise.fit(
        "crra+myopic+logit", str(tmp_path / "parts" / "*.parquet"), by="subject", workers=0
    )
    assert len(by_subject.fits) == 16
    assert any("fitted on rows, not counts" in n for n in getattr(by_subject, "notes", [])) or (
        any("fitted on rows, not counts" in w for w in by_subject.warnings)
    )


@pytest.mark.parametrize("by", [None, "subject"])
def test_describe_parts_streams_trials_and_equals_one_file(tmp_path: Path, by: str | None) -> None:
    # The reference is the description of the same rows as one file (the in-memory path:
    # trial summary of the whole frame); the folder is described part by part, trials that
    # span the seams included.
    frame = _rows()
    _seam_rows(frame)
    _write_parts(frame, tmp_path / "parts")
    whole = describe_rows(frame, by=by)
    parts = describe_parts(tmp_path / "parts", by, workers=0)
    public = describe_any(tmp_path / "parts", by=by).to_dict()  # NaN == NaN as text
    assert json.dumps(public, sort_keys=True) == json.dumps(parts.to_dict(), sort_keys=True)
    assert parts.source == str(tmp_path / "parts")
    pd.testing.assert_frame_equal(parts.table, whole.table, check_exact=False, rtol=1e-12)
    pd.testing.assert_frame_equal(parts.stop_steps, whole.stop_steps, check_exact=False, rtol=1e-12)
    assert parts.table["n_trials"].sum() == 160


def test_describe_command_on_a_folder_refuses_a_defect_and_writes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    frame = _rows()
    paths = _write_parts(frame, tmp_path / "parts")
    third = pd.read_parquet(paths[2])
    third.loc[4, "action"] = "jump"
    third.to_parquet(paths[2], index=False)
    out = tmp_path / "describe.json"
    code = cli.main(["describe", str(tmp_path / "parts"), "--workers", "0", "--json", str(out)])
    err = capsys.readouterr().err
    assert code == 2 and f"{paths[2]}:6: column 'action'" in err and not out.exists()
    code = cli.main(["describe", str(tmp_path / "parts"), "--by", "treatment", "--workers", "0"])
    assert code == 2 and "no column 'treatment'" in capsys.readouterr().err
