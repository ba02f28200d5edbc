"""Sweeps in the report: a saved sweep JSON loads, is drawn one figure per line of its grid
with its certification in the caption, and uncertified points are warned about."""

from __future__ import annotations

import json

import numpy as np
import pytest

from stopwise._io import dumps_json
from stopwise.contest import sweep
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.report.content import build_content
from stopwise.saved import SavedSweep, load_result


@pytest.fixture(scope="module")
def sweep_record():
    table = sweep([0.8, 0.85, 0.9], [1.0, 4.0], 2, concept="nash", progress=False)
    return json.loads(dumps_json({"axis": "p_survive", "rows": table.to_dict(orient="records")}))


def test_a_saved_sweep_loads_and_splits_into_the_lines_of_its_grid(sweep_record, tmp_path):
    path = tmp_path / "sweep.json"
    path.write_text(json.dumps(sweep_record), encoding="utf-8")
    saved = load_result(path)
    assert isinstance(saved, SavedSweep) and saved.axis == "p_survive"
    lines = saved.lines()
    assert [float(line["prize"].iloc[0]) for line in lines] == [1.0, 4.0]
    for line in lines:
        assert list(line["p_survive"]) == [0.8, 0.85, 0.9]
        # every point's equilibrium is a probability distribution over targets
        probs = line[[c for c in line.columns if c.startswith("prob_")]].fillna(0.0)
        np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-9)


def test_report_draws_each_line_with_its_certificate(sweep_record, tmp_path):
    path = tmp_path / "sweep.json"
    path.write_text(json.dumps(sweep_record), encoding="utf-8")
    content = build_content(None, [path])
    section = next(s for s in content.sections if s.title == "Sweeps")
    figures = [b for b in section.blocks if b.kind == "figure"]
    assert len(figures) == 2 and all(f.png.startswith(b"\x89PNG") for f in figures)
    assert all("all 3 points certified" in f.text for f in figures)
    assert not content.warnings


def test_uncertified_points_are_named_in_the_caption_and_the_warnings(sweep_record, tmp_path):
    record = json.loads(json.dumps(sweep_record))
    record["rows"][1]["certified"] = False
    path = tmp_path / "sweep.json"
    path.write_text(json.dumps(record), encoding="utf-8")
    content = build_content(None, [path])
    section = next(s for s in content.sections if s.title == "Sweeps")
    assert "1 of 3 points NOT certified" in section.blocks[0].text
    assert any("not certified" in w for w in content.warnings)


def test_a_sweep_without_its_certificate_columns_is_refused(sweep_record, tmp_path):
    record = json.loads(json.dumps(sweep_record))
    for row in record["rows"]:
        del row["certified"]
    path = tmp_path / "sweep.json"
    path.write_text(json.dumps(record), encoding="utf-8")
    with pytest.raises(StopwiseInputError, match="certified"):
        load_result(path)
