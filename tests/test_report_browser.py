"""Render the report in headless Chromium: every image loads, no console error, a screenshot."""

from __future__ import annotations

import html
import os
import re
import shutil
import subprocess

import numpy as np
import pytest
from test_report_synthetic import build_synthetic_store

from pipeline.errors import StageError
from pipeline.report import build_report
from pipeline.report.page import find_chromium, run_chromium
from pipeline.session import Session

pytestmark = pytest.mark.browser

# Runs after the page loaded: lists images that failed (complete but naturalWidth 0) into the
# DOM, where --dump-dom shows it (HTMLImageElement.naturalWidth, WHATWG HTML standard).
_PROBE = """<script>
window.addEventListener("load", function () {
  var imgs = Array.prototype.slice.call(document.images), bad = [];
  imgs.forEach(function (im) { if (!im.complete || im.naturalWidth === 0) bad.push(im.src); });
  var out = document.createElement("pre");
  out.id = "probe";
  out.textContent = "images=" + imgs.length + " broken=" + bad.length + " " + bad.join(" ");
  document.body.appendChild(out);
});
</script>"""


def _chromium() -> str:
    exe = find_chromium()
    if exe is None and shutil.which("apt-get") and os.geteuid() == 0:
        env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
        subprocess.run(["apt-get", "install", "-y", "-q", "chromium"], env=env,
                       capture_output=True, timeout=900, check=False)
        exe = find_chromium()
    if exe is None:
        pytest.skip("headless Chromium is not installed and could not be installed with "
                    "apt-get (needs root and the Debian 'chromium' package)")
    return exe


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    exe = _chromium()
    root = tmp_path_factory.mktemp("browser") / "out"
    build_synthetic_store(root, np.random.default_rng(3), skip=("tuning",))
    page = build_report(Session.open(root), root / "report")
    probe = page.with_name("probe.html")
    probe.write_text(page.read_text().replace("</body>", _PROBE + "</body>"))
    dom = run_chromium(probe, "--dump-dom", "--virtual-time-budget=10000", exe=exe)
    shot = page.with_name("screenshot.png")
    run = run_chromium(page, f"--screenshot={shot}", "--window-size=1100,3000", exe=exe)
    return page, dom, run, shot


def test_every_image_loads(rendered):
    page, dom, _run, _shot = rendered
    m = re.search(r'<pre id="probe">([^<]*)</pre>', dom.stdout)
    assert m, f"probe did not run; chromium stderr: {dom.stderr[-2000:]}"
    text = html.unescape(m.group(1))
    n_img = int(re.search(r"images=(\d+)", text).group(1))
    assert n_img == page.read_text().count("<img ") and n_img >= 10
    assert "broken=0" in text, text


def test_no_console_error(rendered):
    _page, dom, run, _shot = rendered
    for proc in (dom, run):
        bad = [ln for ln in proc.stderr.splitlines()
               if "Uncaught" in ln or "ERROR:CONSOLE" in ln or "Failed to load resource" in ln]
        assert bad == []


def test_screenshot_saved(rendered):
    _page, _dom, run, shot = rendered
    assert shot.exists(), run.stderr[-2000:]
    # reference: the PNG signature and IHDR width field, ISO/IEC 15948 (from memory)
    head = shot.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    assert int.from_bytes(head[16:20], "big") == 1100


def test_missing_chromium_is_a_clear_error(tmp_path, monkeypatch):
    import pipeline.report.page as page_mod

    monkeypatch.setattr(page_mod, "find_chromium", lambda: None)
    with pytest.raises(StageError, match="needs Chromium: install the 'chromium' package"):
        page_mod.run_chromium(tmp_path / "x.html")
