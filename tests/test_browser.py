"""The scan report in a real browser: headless Chromium loads report.html from disk,
with no console error, and paints a page that is not blank.

Skips (with its reason) only where no Chromium is installed; fails instead when
SHORTCUT_AUDIT_REQUIRE_BROWSER=1 (CI sets it, and installs Debian's ``chromium``).
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from scan_fixtures import corner_model, make_dataset
from shortcut_audit.report import write_scan_report
from shortcut_audit.scan import audit as run_audit

WIDTH, HEIGHT = 1280, 2000
#: The masthead's background, ``--ink`` of templates/base.html.j2.
MASTHEAD = (0x1E, 0x24, 0x30)
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--enable-logging=stderr", "--v=0"]


def find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").is_file() else None


@pytest.fixture(scope="module")
def chromium() -> str:
    found = find_chromium()
    if found is None:
        reason = "no Chromium found (shutil.which('chromium'), /usr/bin/chromium); apt-get install chromium"
        if os.environ.get("SHORTCUT_AUDIT_REQUIRE_BROWSER") == "1":
            pytest.fail(f"SHORTCUT_AUDIT_REQUIRE_BROWSER=1 but {reason}")
        pytest.skip(reason)
    return found


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("browser")
    make_dataset(tmp / "data", n=6)
    write_scan_report(run_audit(tmp / "data", corner_model(tmp / "m.onnx"), out=tmp / "out"), tmp / "out")
    return tmp / "out" / "report.html"


def run(chromium: str, tmp: Path, *args: str) -> subprocess.CompletedProcess:
    """Run Chromium in its own session (so a hang is ended with all its children)."""
    env = dict(os.environ, HOME=str(tmp))  # nothing lands in the real home folder
    proc = subprocess.Popen([chromium, *FLAGS, f"--user-data-dir={tmp / 'profile'}", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            start_new_session=True, text=True, errors="replace")
    try:
        out, err = proc.communicate(timeout=120)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        out, err = proc.communicate()
        pytest.fail(f"chromium did not finish within 120 s; stderr tail: {err[-2000:]}")
    return subprocess.CompletedProcess(proc.args, proc.returncode, out, err)


def console_errors(stderr: str) -> list[str]:
    """Lines of Chromium's log that come from the page's console (the report writes none:
    it has no script), or that report a blocked or failed load."""
    bad = (":CONSOLE", "Uncaught", "Content Security Policy", "Refused to", "net::ERR_")
    return [line for line in stderr.splitlines() if any(b in line for b in bad)]


def test_console_check_catches_a_broken_page(chromium, tmp_path):
    # The control: a page with a script error and a network image, under the report's policy.
    page = tmp_path / "broken.html"
    page.write_text('<!doctype html><html><head><meta http-equiv="Content-Security-Policy" '
                    'content="default-src \'none\'; img-src data:"><title>t</title></head><body>'
                    '<img src="https://example.invalid/x.png"></body></html>', encoding="utf-8")
    done = run(chromium, tmp_path, "--dump-dom", page.as_uri())
    assert any("example.invalid" in line for line in console_errors(done.stderr)), done.stderr[-2000:]


def test_report_loads_without_console_errors(chromium, report, tmp_path):
    done = run(chromium, tmp_path, "--dump-dom", report.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    assert console_errors(done.stderr) == []
    dom = done.stdout
    assert "<title>Shortcut audit of m.onnx</title>" in dom
    assert "1 finding in 1 of 3 classes." in dom
    assert "<script" not in dom


def test_report_screenshot_is_not_blank(chromium, report, tmp_path):
    shot = tmp_path / "report.png"
    done = run(chromium, tmp_path, f"--screenshot={shot}", f"--window-size={WIDTH},{HEIGHT}",
               "--hide-scrollbars", report.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    assert console_errors(done.stderr) == []
    pixels = np.asarray(Image.open(shot).convert("RGB"), dtype=np.float64)
    assert pixels.shape == (HEIGHT, WIDTH, 3)
    assert pixels.var() > 100.0
    # The dark masthead is painted at the top, the light page under it.
    np.testing.assert_allclose(pixels[10, 10], MASTHEAD, atol=3)
    assert pixels[HEIGHT // 2].mean() > 150
    # Figures are painted: viridis colours (no grey) appear somewhere on the page.
    r, g, b = pixels[..., 0], pixels[..., 1], pixels[..., 2]
    assert np.count_nonzero((g - r > 60) & (b - r > 20)) > 200
