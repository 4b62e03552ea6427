"""The report opened in headless Chromium: every image loads and the console stays silent.

The product report carries no script; the test adds a small one to a *copy* of the report
that writes, after the window's load event, how many images there are and how many did
not decode into ``<body data-imgcheck="TOTAL:BROKEN">``; ``--dump-dom`` then returns it.
Console messages reach stderr through ``--enable-logging=stderr`` as lines with "CONSOLE".
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

from invariance.report import write_report
from report_fixtures import make_failure, scene_names, two_encoder_results, write_scene_images

pytestmark = pytest.mark.browser

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)

_IMAGE_CHECK = """<script>
window.addEventListener('load', function () {
  var images = document.images, broken = 0;
  for (var i = 0; i < images.length; i++) {
    if (!(images[i].complete && images[i].naturalWidth > 0)) { broken++; }
  }
  document.body.setAttribute('data-imgcheck', images.length + ':' + broken);
});
</script>"""


def _open_in_chromium(page: Path, profile: Path) -> tuple[str, str]:
    """Load ``page`` headless and return (DOM after load, stderr)."""
    command = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
        "--virtual-time-budget=5000", "--dump-dom", page.as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=90)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout, done.stderr


def _check(report_text: str, folder: Path, name: str, extra: str = "") -> tuple[int, int, list[str]]:
    """(images, broken images, console lines) for ``report_text`` with the check script added."""
    copy = folder / f"{name}.html"
    copy.write_text(report_text.replace("</body>", extra + _IMAGE_CHECK + "</body>"), encoding="utf-8")
    dom, stderr = _open_in_chromium(copy, folder / f"profile-{name}")
    found = re.search(r'data-imgcheck="(\d+):(\d+)"', dom)
    assert found, "the image check did not run after the load event"
    console = [line for line in stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]
    return int(found.group(1)), int(found.group(2)), console


@pytest.fixture(scope="module")
def report_text(tmp_path_factory):
    if CHROMIUM is None:
        pytest.skip("headless Chromium not installed (Debian package 'chromium'); CI installs it")
    root = tmp_path_factory.mktemp("browser")
    scenes = write_scene_images(root / "scenes", scene_names(48))
    out = write_report(root / "report.html", two_encoder_results(scenes), failures=[make_failure()])
    return out.read_text(encoding="utf-8")


def test_every_image_loads_and_console_is_silent(report_text, tmp_path):
    images, broken, console = _check(report_text, tmp_path, "report")
    assert images == report_text.count("<img ")
    assert images > 20 and broken == 0
    assert console == []


def test_the_check_notices_a_broken_image_and_a_console_error(report_text, tmp_path):
    # Guards the harness itself: if this passes, a silent result above means something.
    faults = '<img src="data:image/png;base64,AAAA" alt="broken"><script>undefinedCall();</script>'
    images, broken, console = _check(report_text, tmp_path, "faulty", faults)
    assert broken == 1 and images == report_text.count("<img ") + 1
    assert any("undefinedCall" in line for line in console)
