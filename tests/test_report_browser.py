"""The analysis report in a real browser: headless Chromium (Debian's package; ``.ci/run``
installs it when missing) loads the page from disk with no network, and a check run inside the
page reports whether every image decoded and whether anything reaches past a 1280-pixel-wide
window. It also renders the screenshot a person looks at."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from monitor.analysis.record import load_record
from monitor.analysis.report import write_report
from monitor.analysis.sweep import analyse
from tests.sim_helpers import sweep_capture

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
if CHROMIUM is None and os.environ.get("CI"):
    raise RuntimeError("CI needs Chromium for the report test (.ci/run installs Debian's chromium)")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="no chromium on this machine (apt-get install chromium)")

CHECK = """<script>
window.addEventListener('load', () => {
  const imgs = [...document.images];
  const bad = imgs.filter(i => !(i.complete && i.naturalWidth > 0)).length;
  const over = [...document.querySelectorAll('body *')].filter(e => e.getBoundingClientRect().right > 1280.5).length;
  document.body.setAttribute('data-check', JSON.stringify({images: imgs.length, bad: bad, over: over,
    scroll: document.documentElement.scrollWidth}));
});
</script>"""


def chromium(*args, cwd):
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
           "--no-first-run", "--hide-scrollbars", "--window-size=1280,4000", "--virtual-time-budget=15000", *args]
    return subprocess.run(cmd, capture_output=True, text=True, cwd=cwd, timeout=120)


def page_check(page: Path) -> dict:
    """The in-page check's result for ``page``: a copy with :data:`CHECK` appended, in Chromium."""
    check = page.with_name("check.html")
    check.write_text(page.read_text(encoding="utf-8").replace("</body>", CHECK + "</body>"), encoding="utf-8")
    p = chromium("--dump-dom", check.as_uri(), cwd=page.parent)
    found = re.search(r"data-check=\"([^\"]+)\"", p.stdout)
    assert found, p.stderr[-2000:]
    return json.loads(found.group(1).replace("&quot;", '"'))


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    sc = sweep_capture(d / "sweep.spinrec", "brisling5_chipped_prop", seed=1)
    return write_report(analyse(load_record(d / "sweep.spinrec"), sc.motors.blades), d / "out")


def test_every_image_loads_and_nothing_overflows_1280_pixels(report):
    result = page_check(report)
    assert result["images"] == 3 and result["bad"] == 0
    assert result["over"] == 0 and result["scroll"] <= 1280


def test_the_tap_report_loads_every_image_within_1280_pixels(tmp_path):
    from tests.sim_helpers import tap_capture

    tap_capture(tmp_path / "taps.spinrec", "brisling5", taps=2)
    from monitor.analysis.tap_report import write_tap_report
    from monitor.analysis.taps import analyse_taps, identify_modes
    from monitor.tap_command import _record

    x, fs, fsd = _record(str(tmp_path / "taps.spinrec"))
    taps, modes = identify_modes(analyse_taps(x, fs, fsd))
    page = write_tap_report("taps.spinrec", taps, modes, tmp_path / "out")
    result = page_check(page)
    assert result["images"] == 2 and result["bad"] == 0 and result["over"] == 0 and result["scroll"] <= 1280


def test_the_page_renders_to_a_screenshot(report):
    shot = report.with_name("report.png")
    p = chromium(f"--screenshot={shot}", report.as_uri(), cwd=report.parent)
    assert shot.exists(), p.stderr[-2000:]
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width = int.from_bytes(data[16:20], "big")
    assert width == 1280
    keep = os.environ.get("SPINRIG_KEEP_SCREENSHOT")
    if keep:  # for a person to look at
        shutil.copy(shot, keep)
