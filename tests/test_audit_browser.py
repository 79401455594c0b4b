"""The audit report in a real browser: headless Chromium renders report.html; the screenshot is not blank and
every image on the page loaded.

Where Chromium is missing the test says so and skips (CI installs Debian's `chromium`, see .ci/run, and sets
PROTOMINE_REQUIRE_BROWSER=1 so that it can never skip there).  "Loaded" is the browser's own verdict:
``img.complete && img.naturalWidth > 0`` for every <img>, read back from the DOM after load (a copy of the
page gets a few lines of script for that; the report itself has none).
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess

import numpy as np
import pytest

from protomine.audit.run import run_audit

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--no-first-run", "--disable-sync"]
PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var bad = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); }).length;
  var p = document.createElement('p'); p.id = 'probe';
  p.textContent = 'images=' + imgs.length + ' broken=' + bad;
  document.body.appendChild(p);
});
</script></body>"""


def _chromium() -> str:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        if os.environ.get("PROTOMINE_REQUIRE_BROWSER"):
            pytest.fail("Chromium is required here (PROTOMINE_REQUIRE_BROWSER is set) but not installed")
        pytest.skip("Chromium is not installed (apt-get install -y chromium): the report was not checked in a browser")
    return exe


def _run(exe: str, profile, *args) -> subprocess.CompletedProcess:
    return subprocess.run([exe, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True, text=True,
                          timeout=180)


def test_report_renders_in_chromium(tmp_path, tiny_world):
    exe = _chromium()
    truth = tmp_path / "truth.csv"
    truth.write_text("object,label\ncap0/1,box\ncap0/2,cylinder\ncap1/1,box\ncap2/2,cylinder\ncap1/2,box\n")
    out = tmp_path / "report"
    run_audit(tiny_world["library"], truth, out, tiny_world["cfg"], store=tiny_world["store"], plan=2)
    page = (out / "report.html").read_text()
    n_img = len(re.findall(r"<img\b", page))
    assert n_img >= 3                                   # member strips of both clusters and the gallery

    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", PROBE))
    res = _run(exe, tmp_path / "profile1", "--virtual-time-budget=5000", "--dump-dom", probe.as_uri())
    found = re.search(r"images=(\d+) broken=(\d+)", res.stdout)
    assert found, f"no probe in Chromium's DOM dump (exit {res.returncode}): {res.stderr[-500:]}"
    assert int(found.group(1)) == n_img and int(found.group(2)) == 0

    shot = tmp_path / "shot.png"
    _run(exe, tmp_path / "profile2", "--window-size=1200,1600", "--hide-scrollbars", f"--screenshot={shot}",
         (out / "report.html").as_uri())
    from PIL import Image
    img = np.asarray(Image.open(shot).convert("RGB"), dtype=np.float64)
    assert img.shape[0] >= 1000 and img.shape[1] >= 1000
    paper = np.array([0xfb, 0xfa, 0xf7], dtype=np.float64)
    inked = np.abs(img - paper).sum(axis=2) > 40         # pixels that differ from the page background
    assert 0.02 < inked.mean() < 0.9                    # text, tables and pictures, not a blank or solid page
    assert img.std() > 10
