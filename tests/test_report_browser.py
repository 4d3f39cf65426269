"""The HTML report in a real browser: headless Chromium renders it, runs its script, themes it.

Needs Debian's ``chromium`` package (``.ci/run`` installs it in CI). Without it
the tests are skipped locally and fail in CI (``CI=true``), so CI cannot skip
them silently. Run locally with ``apt-get install chromium`` and
``python -m pytest -m browser``.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pytest

from gate.report.html import render
from tests.reportkit import demo_result

pytest.importorskip("matplotlib")  # reads the screenshots (PNG) in the colour-scheme test

pytestmark = pytest.mark.browser
CHROMIUM_FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--hide-scrollbars",
)


def _chromium() -> str:
    # Debian's chromium here and in .ci/run; hosted GitHub runners ship Google Chrome instead.
    path = (shutil.which("chromium") or shutil.which("chromium-browser")
            or shutil.which("google-chrome") or shutil.which("google-chrome-stable"))
    if path is None and Path("/usr/bin/chromium").exists():
        path = "/usr/bin/chromium"
    if path is None:
        if os.environ.get("CI") == "true":
            pytest.fail("chromium is not installed; CI must run the browser test "
                        "(apt-get install chromium)")
        pytest.skip("chromium is not installed (apt-get install chromium to run this test)")
    return path


def _run(args: list[str], tmp_path: Path, report: Path) -> subprocess.CompletedProcess[str]:
    profile = tmp_path / "profile"
    profile.mkdir(exist_ok=True)
    cmd = [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args, report.as_uri()]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=False,
                          env={**os.environ, "HOME": str(tmp_path)})


def _screenshot(tmp_path: Path, report: Path, name: str, *extra: str):
    from matplotlib.image import imread

    png = tmp_path / f"{name}.png"
    done = _run([f"--screenshot={png}", "--window-size=1200,900", *extra], tmp_path, report)
    assert png.exists(), f"no screenshot; chromium said: {done.stderr[-800:]}"
    pixels = imread(str(png))  # floats in [0, 1], height x width x (3 or 4)
    return (pixels[:, :, :3] * 255).round().astype("uint8")


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("browser") / "report.html"
    path.write_text(render(demo_result(hostile=True)), encoding="utf-8")
    return path


def test_report_renders_with_content_and_follows_the_colour_scheme(
        tmp_path: Path, report: Path) -> None:
    import numpy as np

    light = _screenshot(tmp_path, report, "light")
    assert light.shape[:2] == (900, 1200)
    colours = np.unique(light.reshape(-1, 3), axis=0)
    assert len(colours) > 200  # text, charts and tables, not a blank or single-colour page
    background = np.median(light.reshape(-1, 3), axis=0)
    differs = np.abs(light.astype(int) - background).sum(axis=2) > 60
    assert differs.mean() > 0.03  # a real share of the page is drawn on
    dark = _screenshot(tmp_path, report, "dark", "--force-dark-mode")
    assert dark.mean() < light.mean() - 60  # prefers-color-scheme: dark switches the palette


def test_inline_script_runs_under_the_content_security_policy(
        tmp_path: Path, report: Path) -> None:
    done = _run(["--dump-dom"], tmp_path, report)
    assert done.returncode == 0, done.stderr[-800:]
    dom = done.stdout
    assert "<svg" in dom and "roofline" in dom
    # the sort script turned every header of the sortable tables into a button
    assert dom.count('title="sort by this column"') >= 10
    assert "onerror=alert" not in dom.replace("&lt;img src=x onerror=alert(1)&gt;", "")


def test_failing_section_comes_first_and_offending_layers_are_marked(tmp_path: Path) -> None:
    """On the realistic demo result (tests/golden/demo_result.json, a real run): the browser's
    DOM, after the script ran, has the failing model's section above the passing one, the
    blocking list above both, and the failing layer marked in both of its charts."""
    import re

    from gate.report.jsonout import read_result

    golden = Path(__file__).parent / "golden" / "demo_result.json"
    page = tmp_path / "demo.html"
    page.write_text(render(read_result(str(golden))), encoding="utf-8")
    done = _run(["--dump-dom"], tmp_path, page)
    assert done.returncode == 0, done.stderr[-800:]
    dom = done.stdout
    statuses = re.findall(r'<section class="card st-([a-z]+) entry"', dom)
    assert "fail" in statuses and "pass" in statuses
    first_fail = dom.index('<section class="card st-fail entry"')
    first_pass = dom.index('<section class="card st-pass entry"')
    assert dom.index('id="blocking"') < first_fail < first_pass
    failing = dom[first_fail:dom.index("</section>", first_fail)]
    svgs = re.findall(r"<svg\b.*?</svg>", failing, re.DOTALL)
    assert len(svgs) == 2
    for svg in svgs:  # the roofline ring and the bar-chart row of the widened layer
        assert re.search(r'class="flagged" data-layer="stage4\.block1\.conv2"', svg), svg[:200]


def test_blocking_and_not_gated_lead_the_rendered_page(tmp_path: Path) -> None:
    """The realistic demo result plus a changed model outside every model group: after the
    browser ran the page, the first section is what blocks the merge (the blocking findings,
    then the not-gated model), above the overview and every model's section; on screen that
    section is at the top, marked with the failure colour; and the failing layer is marked in
    both of its charts."""
    import re
    from dataclasses import replace

    import numpy as np

    from gate.report.jsonout import read_result
    from gate.result import UngatedModel

    golden = Path(__file__).parent / "golden" / "demo_result.json"
    result = replace(read_result(str(golden)), ungated=(
        UngatedModel("models/drone/landing.onnx", "no model group covers it"),))
    page = tmp_path / "lead.html"
    page.write_text(render(result), encoding="utf-8")
    done = _run(["--dump-dom"], tmp_path, page)
    assert done.returncode == 0, done.stderr[-800:]
    dom = done.stdout
    sections = re.findall(r'<section class="[^"]*" id="([^"]*)"', dom)
    assert sections[0] == "blocking" and sections.index("overview") > 0
    lead = dom[dom.index('id="blocking"'):dom.index("</section>", dom.index('id="blocking"'))]
    assert lead.index('id="blocking-findings"') < lead.index('id="not-gated"')
    assert "stage4.block1.conv2" in lead and "models/drone/landing.onnx" in lead
    flagged = re.findall(r'<svg\b.*?</svg>', dom, re.DOTALL)[:2]  # the failing model's charts
    assert all('class="flagged" data-layer="stage4.block1.conv2"' in svg for svg in flagged)
    # on screen: the failure colour (--rg-fail, #b3261e in the light palette) marks the left
    # edge of the first card, in the top half of a 1200 x 900 window
    pixels = _screenshot(tmp_path, page, "lead").astype(int)
    red = np.abs(pixels - np.array([0xb3, 0x26, 0x1e])).sum(axis=2) < 40
    rows = np.nonzero(red[:, :80].any(axis=1))[0]
    assert rows.size and rows.min() < 450, rows[:5]
