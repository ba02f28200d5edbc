"""The runnable examples (examples/*.py) run to the end at small settings (--small) and
write what their comments promise, so that they never rot. Slower ones are marked slow."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"

CASES = [
    ("01_solo_study.py", ["solo_report.html", "hives.csv"], "r:C(treatment)[T.1]", False),
    ("02_lottery_and_stopping.py", [], "SE of r:", False),
    ("03_contest.py", ["contest_targets.png", "contest_schemes.svg"], "8 + own jars", True),
    ("04_hierarchical_bayes.py", ["shrinkage.png", "shrinkage.svg"], "max R-hat", True),
    ("05_design_check.py", [], "AIC picks the generating model", True),
]


def test_every_example_is_listed_here_and_in_the_readme():
    scripts = sorted(p.name for p in EXAMPLES.glob("[0-9]*.py"))
    assert scripts == sorted(c[0] for c in CASES)
    readme = (EXAMPLES.parent / "README.md").read_text()
    assert all(f"examples/{name}" in readme for name in scripts)


@pytest.mark.parametrize(
    ("script", "outputs", "printed"),
    [
        pytest.param(s, o, p, marks=[pytest.mark.slow] if slow else [], id=s)
        for s, o, p, slow in CASES
    ],
)
def test_example_runs_at_small_settings(script, outputs, printed, tmp_path):
    run = subprocess.run(
        [sys.executable, str(EXAMPLES / script), "--small", "--out", str(tmp_path)],
        capture_output=True,
        text=True,
        timeout=900,
        check=False,
        cwd=tmp_path,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    assert printed in run.stdout
    for name in outputs:
        assert (tmp_path / name).stat().st_size > 0
