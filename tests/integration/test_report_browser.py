"""`swarmrig report` pages open in a real headless browser (Chromium from the system
packages; .ci/run installs it): every figure is decoded and shown, the page needs nothing
from outside, and it prints to PDF and renders to a screenshot.

Chromium missing is a failure with the reason, never a skip."""

from __future__ import annotations

import base64
import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

# many runs on a shared 2-core machine: a hang guard well above the project's 180 s default
pytestmark = [pytest.mark.integration, pytest.mark.timeout(1200)]

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"

SCENARIO = """
[swarm]
name = "meadow-report"
agents = 5
dimension = 2
iterations = 300
seed = 3
[topology]
shape = "ring"
[objective]
kind = "quadratic"
curvature = "random"
[algorithm]
name = "gradient-tracking"
step = 0.08
[[fault]]
kind = "loss"
name = "rain"
links = "all"
rate = 0.2
start_iteration = 50
duration_iterations = 100
"""

STUDY = """
[study]
name = "meadow-grid"
kind = "grid"
scenario = "meadow.toml"
seeds = 2
engine = "batch"
[vary]
"fault.rain.rate" = [0.0, 0.3]
"""

#: appended to a copy of the page (the report itself has no script): after the load event
#: it writes, for every image, whether the browser decoded it and its natural size
PROBE = """<script>
window.addEventListener('load', () => {
  const imgs = [...document.images].map(i => [i.complete, i.naturalWidth, i.naturalHeight]);
  const pre = document.createElement('pre');
  pre.id = 'probe';
  pre.textContent = JSON.stringify(imgs);
  document.body.appendChild(pre);
});
</script>"""


def _chromium(*args: str) -> subprocess.CompletedProcess:
    if not Path(CHROMIUM).exists():
        pytest.fail(
            f"{CHROMIUM} is missing: the report test needs headless Chromium from the system"
            " packages (apt-get install chromium; .ci/run installs it)",
            pytrace=False,
        )
    return subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
         "--disable-dev-shm-usage", "--virtual-time-budget=10000", *args],
        capture_output=True, text=True, timeout=300,
    )  # fmt: skip


def _check_page(report: Path, tmp: Path) -> None:
    html = report.read_text(encoding="utf-8")
    assert "<script" not in html
    assert "not a safety case" in html
    # self-contained: no URL of any kind except the embedded images
    refs = re.findall(r'(?:src|href)="([^"]*)"', html)
    assert refs and all(r.startswith("data:image/png;base64,") for r in refs), refs[:3]
    # each embedded PNG decodes on its own (Pillow, matplotlib's image library)
    from PIL import Image

    for r in refs:
        img = Image.open(io.BytesIO(base64.b64decode(r.split(",", 1)[1])))
        assert img.format == "PNG" and img.width > 100 and img.height > 100

    probe = tmp / "probe.html"
    probe.write_text(html.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    res = _chromium("--dump-dom", probe.as_uri())
    assert res.returncode == 0, res.stderr[-2000:]
    m = re.search(r'<pre id="probe">(.*?)</pre>', res.stdout, re.S)
    assert m, "the browser did not run the page to its load event:\n" + res.stdout[-2000:]
    shown = json.loads(m.group(1))
    assert len(shown) == len(refs)
    assert all(done and w > 100 and h > 100 for done, w, h in shown), shown

    png, pdf = tmp / "page.png", tmp / "page.pdf"
    res = _chromium(f"--screenshot={png}", "--window-size=1200,3000", report.as_uri())
    assert res.returncode == 0 and png.exists(), res.stderr[-2000:]
    shot = Image.open(png).convert("L")
    assert shot.size == (1200, 3000)
    # a blank page is one colour; figures and tables give many grey levels
    assert len(np.unique(np.asarray(shot))) > 50
    res = _chromium(f"--print-to-pdf={pdf}", "--no-pdf-header-footer", report.as_uri())
    assert res.returncode == 0 and pdf.exists(), res.stderr[-2000:]
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF") and data.count(b"/Type /Page") + data.count(b"/Type/Page") >= 1


def test_study_and_run_reports_open_in_chromium(tmp_path: Path, processes) -> None:
    (tmp_path / "meadow.toml").write_text(SCENARIO)
    (tmp_path / "grid.toml").write_text(STUDY)
    study = tmp_path / "study"
    p = processes.start("study", str(tmp_path / "grid.toml"), "--out", str(study), "--quiet")
    _, err = p.communicate(timeout=600)
    assert p.returncode == 0, err
    p = processes.start("report", str(study))
    _, err = p.communicate(timeout=600)
    assert p.returncode == 0, err
    figures = sorted((study / "figures").glob("*.png"))
    assert len(figures) >= 4
    assert all(f.with_suffix(".svg").exists() for f in figures)
    html = (study / "report.html").read_text()
    assert html.count("<img ") == len(figures)
    _check_page(study / "report.html", tmp_path)

    run = tmp_path / "run"
    p = processes.start("run", str(tmp_path / "meadow.toml"), "--out", str(run),
                        "--engine", "lockstep", "--quiet")  # fmt: skip
    _, err = p.communicate(timeout=600)
    assert p.returncode == 0, err
    p = processes.start("report", str(run))
    _, err = p.communicate(timeout=600)
    assert p.returncode == 0, err
    assert (
        sorted(f.name for f in (run / "figures").glob("*.png"))
        == [
            "gap-vs-time.png",
            "link-delivered-share.png",
        ]
        or len(list((run / "figures").glob("*.png"))) >= 2
    )
    (tmp_path / "run-page").mkdir()
    _check_page(run / "report.html", tmp_path / "run-page")
