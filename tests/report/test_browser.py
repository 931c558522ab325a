"""The report in a real browser: headless Chromium (Debian's ``chromium``
package, which ``.ci/run`` installs) loads it offline with no console
message, and every figure is in the DOM as a PNG that decodes.

Chromium's ``--enable-logging=stderr`` writes each console message of the
page as a line with ``:CONSOLE`` in it; the report has no script, so there
must be none (a script error, a refused resource or a console call would
all show there).
"""

from __future__ import annotations

import base64
import io
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.browser

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]
BLUE = (0x00, 0x72, 0xB2)  # Okabe-Ito blue, the first colour of every figure


def _chromium(args: list[str], profile: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True,
                          text=True, timeout=timeout, check=False)


def _console(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


@pytest.fixture(scope="module")
def page(report, tmp_path_factory) -> Path:
    if CHROMIUM is None:
        pytest.skip("Chromium is not installed (Debian package 'chromium'; .ci/run installs it)")
    path = tmp_path_factory.mktemp("browser") / "report.html"
    path.write_text(report.html, encoding="utf-8")
    return path


def test_the_check_sees_console_errors(tmp_path, page):
    """Control: the same check does catch a page that logs an error."""
    bad = tmp_path / "bad.html"
    bad.write_text("<!DOCTYPE html><html><body><script>console.error('boom')</script></body></html>")
    run = _chromium(["--dump-dom", bad.as_uri()], tmp_path / "profile")
    assert run.returncode == 0, run.stderr[-2000:]
    assert any('"boom"' in line for line in _console(run.stderr))


def test_report_loads_with_no_console_message_and_every_figure(report, page, tmp_path):
    run = _chromium(["--dump-dom", page.as_uri()], tmp_path / "profile")
    assert run.returncode == 0, run.stderr[-2000:]
    assert _console(run.stderr) == []
    dom = run.stdout
    assert "<h1>Lot linkage report</h1>" in dom and "</html>" in dom
    images = re.findall(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"', dom)
    assert len(images) == report.n_figures
    from PIL import Image

    for data in images:
        with Image.open(io.BytesIO(base64.b64decode(data))) as im:
            assert im.format == "PNG" and im.size[0] > 100 and im.size[1] > 100


def test_screenshot_shows_the_figures(report, page, tmp_path):
    """The page renders: the screenshot is made and carries the figures'
    colours (the Okabe-Ito blue of the data) in quantity."""
    shot = tmp_path / "report.png"
    run = _chromium([f"--screenshot={shot}", "--window-size=1280,4000", "--hide-scrollbars", page.as_uri()],
                    tmp_path / "profile")
    assert run.returncode == 0, run.stderr[-2000:]
    assert _console(run.stderr) == []
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1280, 4000)
        rgb = np.asarray(im.convert("RGB")).astype(int)
    near_blue = np.all(np.abs(rgb - np.array(BLUE)) <= 12, axis=2)
    assert near_blue.sum() > 2000  # the first screen holds the completeness map and the ribbon figure
