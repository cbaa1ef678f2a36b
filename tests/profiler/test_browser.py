"""The report page in a real browser: headless Chromium renders the table and every figure.

Skipped when Chromium is absent (``make test`` installs nothing heavy). The page itself carries
no script; to learn whether each embedded image decoded, a *copy* of the page is given a probe
script that writes the count of decoded images into the DOM, which ``--dump-dom`` then shows.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

from tests.profiler.test_report import HOSTILE, hostile_study

from profiler.report import write_report

pytestmark = pytest.mark.browser


def _chromium() -> str | None:
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


CHROMIUM = _chromium()
needs_chromium = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed")

PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; });
  document.body.setAttribute('data-images', imgs.length);
  document.body.setAttribute('data-decoded', ok.length);
  document.body.setAttribute('data-table-rows',
    document.querySelectorAll('#verdict-table tbody tr').length);
});
</script>"""


def _run(args: list[str], tmp: Path, timeout: float = 90) -> subprocess.CompletedProcess:
    base = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
            "--no-first-run", "--disable-background-networking", "--disable-component-update",
            "--disable-sync", "--disable-dev-shm-usage", f"--user-data-dir={tmp / 'profile'}"]
    return subprocess.run(base + args, capture_output=True, text=True, timeout=timeout)


def _check_page(out: Path, tmp: Path, n_curves: int) -> str:
    """Screenshot and DOM checks; returns the rendered DOM."""
    index = out / "index.html"
    shot = tmp / "shot.png"
    proc = _run(["--window-size=1280,2000", f"--screenshot={shot}", index.as_uri()], tmp)
    assert shot.is_file(), proc.stderr[-2000:]
    # A non-trivial screenshot: big enough and far from a single colour.
    import matplotlib.image as mpimg
    import numpy as np

    pixels = mpimg.imread(shot)[..., :3]
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 1000
    colours = np.unique((pixels.reshape(-1, 3) * 255).astype(np.uint8), axis=0)
    assert len(colours) > 200
    assert pixels.std() > 0.05

    probe = out / "probe.html"
    probe.write_text(index.read_text(encoding="utf-8").replace("</body>", PROBE + "</body>"),
                     encoding="utf-8")
    proc = _run(["--virtual-time-budget=5000", "--dump-dom", probe.as_uri()], tmp)
    dom = proc.stdout
    assert 'id="verdict-table"' in dom, proc.stderr[-2000:]
    images = int(re.search(r'data-images="(\d+)"', dom).group(1))
    decoded = int(re.search(r'data-decoded="(\d+)"', dom).group(1))
    rows = int(re.search(r'data-table-rows="(\d+)"', dom).group(1))
    assert images >= n_curves and decoded == images
    assert rows == n_curves
    assert len(re.findall(r'<img src="data:image/png;base64,', dom)) == images
    return dom


@needs_chromium
def test_report_renders_in_headless_chromium(tmp_path):
    """The verdict table and every embedded figure render; the hostile name stays text."""
    study = hostile_study()
    out = tmp_path / "report"
    write_report(study, out)
    dom = _check_page(out, tmp_path, len(study.curves))
    # The rendered DOM shows the name as text (serialised escaped); only the probe is a script.
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in dom
    assert HOSTILE not in dom
    assert dom.count("<script") == 1


@needs_chromium
@pytest.mark.slow
def test_default_study_report_renders_in_headless_chromium(tmp_path):
    """Acceptance: the built-in default study's (quick) report renders with every figure."""
    from profiler.runner import run_study
    from profiler.study import default_study

    result = run_study(default_study(quick=True), store=tmp_path / "s.sqlite",
                       out=tmp_path / "report", quick=True)
    write_report(result, tmp_path / "report")
    _check_page(tmp_path / "report", tmp_path, len(result.curves))

