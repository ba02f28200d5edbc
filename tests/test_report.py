"""``stopwise report``: one self-contained HTML page (figures embedded, nothing fetched),
a Markdown variant with PNG files beside it, a reproducibility record whose SHA-256 values
match coreutils' sha256sum, and bad input refused with exit code 2 and nothing written.
The page is opened in headless Chromium where it is installed."""

from __future__ import annotations

import base64
import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import matplotlib.image as mpimg
import pytest

from stopwise import cli

CHROMIUM = Path("/usr/bin/chromium")
IMG = re.compile(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"')


@pytest.fixture(scope="module")
def study(small_demo, tmp_path_factory):
    """The small demo data with a solo fit, a contest fit and a comparison, via the CLI."""
    folder = tmp_path_factory.mktemp("study")
    data = folder / "dives.csv"
    small_demo["stopping"].to_csv(data, index=False)
    runs = [
        ["fit", str(data), "--model", "crra+myopic+logit", "--json", str(folder / "solo.json")],
        [
            "fit",
            str(data),
            "--model",
            "crra+qre",
            "--max-target",
            "25",
            "--json",
            str(folder / "contest.json"),
        ],
        [
            "compare",
            str(data),
            "--model",
            "crra+myopic+logit",
            "--model",
            "crra+target+logit",
            "--cv-folds",
            "0",
            "--json",
            str(folder / "cmp.json"),
        ],
    ]
    for argv in runs:
        assert cli.main([*argv, "--no-progress"] if argv[0] == "fit" else argv) == 0
    return folder, data, [folder / "solo.json", folder / "contest.json", folder / "cmp.json"]


@pytest.fixture(scope="module")
def html_report(study):
    folder, data, results = study
    out = folder / "report.html"
    argv = ["report", str(data), *map(str, results), "--out", str(out)]
    assert cli.main(argv) == 0
    return out, argv


def test_html_is_self_contained_and_every_figure_is_a_png(html_report):
    out, _ = html_report
    text = out.read_text()
    assert "<script" not in text.lower()
    assert not re.search(r"(src|href)=\"(https?:|//)", text)  # nothing fetched
    assert "@import" not in text and "url(" not in text
    images = IMG.findall(text)
    assert text.count("<img") == len(images) >= 5  # curves, stop steps, comparison, contest x2
    for data in images:
        pixels = mpimg.imread(io.BytesIO(base64.b64decode(data)), format="png")
        assert pixels.shape[0] > 100 and pixels.shape[1] > 100


def test_report_sections_and_warnings_are_present(html_report):
    text = html_report[0].read_text()
    for title in (
        "Data",
        "Fits",
        "Model comparison",
        "Stopping behaviour",
        "Contests",
        "Reproducibility record",
    ):
        assert f"<h2>{title}</h2>" in text
    assert "crra+qre" in text and "(1) crra+myopic+logit" in text


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="coreutils sha256sum not found")
def test_record_names_the_command_and_each_input_digest(html_report, study):
    out, argv = html_report
    text = out.read_text()
    _, data, results = study
    for path in (data, *results):
        reference = subprocess.run(
            ["sha256sum", str(path)], capture_output=True, text=True, check=True
        ).stdout.split()[0]  # coreutils, outside the project
        assert reference in text
    assert "stopwise report " + " ".join(argv[1:3]) in text
    assert "numpy" in text and "Date (UTC)" in text


def test_markdown_report_writes_its_figures_beside_it(study):
    folder, data, results = study
    out = folder / "report.md"
    assert cli.main(["report", str(data), str(results[0]), "--out", str(out)]) == 0
    text = out.read_text()
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", text)
    assert len(links) >= 2
    for link in links:
        png = (folder / link).read_bytes()
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
    assert "| r |" in text


def test_bad_inputs_exit_2_and_write_nothing(study, tmp_path, capsys):
    folder, data, _ = study
    broken = tmp_path / "broken.json"
    broken.write_text('{"model": "crra+logit", "params": [')
    out = tmp_path / "r.html"
    assert cli.main(["report", str(data), str(broken), "--out", str(out)]) == 2
    assert "broken.json" in capsys.readouterr().err and not out.exists()
    assert cli.main(["report", str(data), str(data), "--out", str(out)]) == 2
    assert "at most one data file" in capsys.readouterr().err and not out.exists()
    assert cli.main(["report", str(data), "--out", str(data)]) == 2  # output is an input
    assert json.loads((folder / "solo.json").read_text())["model"] == "crra+myopic+logit"


PROBE = """<script>
window.__errors = [];
window.addEventListener("error", e => window.__errors.push(String(e.message || e.target.src || e.type)), true);
window.addEventListener("load", () => {
  const sizes = Array.from(document.images).map(i => [i.naturalWidth, i.naturalHeight]);
  const fetched = performance.getEntriesByType("resource").map(r => r.name)
      .filter(n => !n.startsWith("data:"));
  const out = document.createElement("pre");
  out.id = "probe";
  out.textContent = JSON.stringify({sizes, fetched, errors: window.__errors});
  document.body.appendChild(out);
});
</script>"""


def browser_check(page: Path, tmp_path: Path) -> tuple[dict, str]:
    """Open a copy of ``page`` with the probe in headless Chromium; (probe result, the
    browser's console log lines)."""
    probed = tmp_path / f"probed_{page.name}"
    probed.write_text(page.read_text().replace("<head>", "<head>" + PROBE, 1))
    run = subprocess.run(
        [
            str(CHROMIUM),
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-background-networking",
            "--enable-logging=stderr",
            "--v=0",
            "--virtual-time-budget=10000",
            "--dump-dom",
            probed.as_uri(),
        ],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    found = re.search(r'<pre id="probe">(.*?)</pre>', run.stdout, re.S)
    assert found, f"the probe did not run; chromium said: {run.stderr[-2000:]}"
    result = json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    console = [ln for ln in run.stderr.splitlines() if "CONSOLE" in ln]
    return result, "\n".join(console)


needs_chromium = pytest.mark.skipif(
    not CHROMIUM.exists(),
    reason="/usr/bin/chromium is not installed (Debian package chromium; .ci/run installs it "
    "where apt is available)",
)


@needs_chromium
def test_report_opens_in_chromium_without_errors(html_report, tmp_path):
    result, console = browser_check(html_report[0], tmp_path)
    assert result["errors"] == [] and "Uncaught" not in console, (result, console)
    assert result["fetched"] == []
    assert len(result["sizes"]) >= 5
    assert all(w > 0 and h > 0 for w, h in result["sizes"])


@needs_chromium
def test_browser_probe_catches_a_broken_image(html_report, tmp_path):
    """Negative control: the probe must notice an image that does not decode."""
    broken = tmp_path / "broken.html"
    broken.write_text(
        html_report[0]
        .read_text()
        .replace("data:image/png;base64,", "data:image/png;base64,AAAA", 1)
    )
    result, _ = browser_check(broken, tmp_path)
    assert any(w == 0 for w, _ in result["sizes"])
