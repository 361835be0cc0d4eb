"""`hierarchy report`: one self-contained HTML page, checked in a real
headless browser (Chromium from the system packages; .ci/run installs it)."""

import html
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hierarchy.cli import main

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def run(*args):
    return subprocess.run([sys.executable, "-m", "hierarchy", *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT, timeout=300)


@pytest.fixture(scope="module")
def designed(tmp_path_factory):
    """A real budget-form design (two senses under one budget) with the
    information floor that ``hierarchy design`` writes beside it."""
    folder = tmp_path_factory.mktemp("report")
    result = folder / "two-senses.json"
    out = run("design", "specs/two-senses.yaml", "--json", result, "--restarts", 1)
    assert out.returncode in (0, 1), out.stderr
    data = json.loads(result.read_text())
    page = folder / "report.html"
    out = run("report", result, "-o", page)
    assert out.returncode == 0, out.stderr
    return data, page.read_text(encoding="utf-8"), page


def test_the_page_holds_everything_inline(designed):
    data, page, _ = designed
    assert page.startswith("<!DOCTYPE html>")
    # Self-contained: no scripts, no style sheets or pictures fetched from elsewhere.
    assert "<script" not in page and "<link" not in page
    assert not re.search(r"""(src|href)=["'](?!data:)""", page)
    assert page.count('src="data:image/png;base64,') == 1
    for lid in data["links"]:
        assert lid.replace(">", "&gt;") in page
    # The spec text that made the design, and both versions.
    spec_text = (ROOT / "specs/two-senses.yaml").read_text()
    assert html.escape(spec_text.splitlines()[-1].strip()) in page
    assert data["source"]["sha256"] in page
    assert "result written by hierarchy " in page and "report written by hierarchy " in page
    # The bound and the gap.
    floor = data["floor"]
    assert floor["status"] == "optimal" and floor["objective"] <= data["objective"]
    assert floor["gap"] == pytest.approx(data["objective"] - floor["objective"], rel=1e-12)
    assert "lower bound" in page and f"{floor['objective']:.6g}"[:6] in page
    assert html.escape(floor["loose"][0], quote=True) in page
    # A budgeted link shows its budget, not a price of 0.
    assert "budget upward" in page


def test_silent_links_give_their_reasons(tmp_path):
    data = json.loads((ROOT / "gallery/single-loop.json").read_text())
    silent = [lid for lid, row in data["links"].items() if row.get("silent")]
    assert silent, "the single loop's prediction is silent at its price"
    path = tmp_path / "r.json"
    path.write_text(json.dumps(data))
    assert main(["report", str(path), "-o", str(tmp_path / "r.html")]) == 0
    page = (tmp_path / "r.html").read_text()
    for lid in silent:
        assert html.escape(data["links"][lid]["silent_reason"]) in page


def test_bad_report_path_is_refused_before_reading(tmp_path, capsys):
    path = tmp_path / "r.json"
    path.write_text("{not json")
    assert main(["report", str(path), "-o", str(tmp_path / "r.pdf")]) == 2
    err = capsys.readouterr().err
    assert "HTML" in err and "fix:" in err
    assert main(["report", str(path), "-o", str(tmp_path / "r.html")]) == 2
    assert "not valid JSON" in capsys.readouterr().err
    assert not (tmp_path / "r.html").exists()


def test_the_page_renders_in_a_headless_browser(designed, tmp_path):
    if CHROMIUM is None:
        if os.environ.get("HIERARCHY_REQUIRE_BROWSER"):
            pytest.fail("chromium is not installed (apt-get install -y chromium)")
        pytest.skip("chromium is not installed (apt-get install -y chromium); .ci/run installs it")
    from matplotlib.image import imread

    _, _, page = designed
    shot = tmp_path / "shot.png"
    width, height = 1000, 1400
    done = subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
         f"--window-size={width},{height}", f"--screenshot={shot}", page.as_uri()],
        capture_output=True, text=True, timeout=120)
    assert shot.exists(), done.stderr
    pixels = imread(shot)[..., :3]
    assert pixels.shape[:2] == (height, width)
    # Not blank: a good part of the window is drawn (text, tables, the drawing)...
    ink = np.any(pixels < 0.9, axis=2)
    assert ink.mean() > 0.03, ink.mean()
    # ...and in the page's colours: the residual blue (#0072B2) of the
    # drawing and of the link table, which no default browser style has.
    blue = np.all(np.abs(pixels - np.array([0x00, 0x72, 0xB2]) / 255) < 0.08, axis=2)
    assert blue.sum() > 200, blue.sum()
