"""The report as a person sees it, in a real browser (headless Chromium).

What is checked: the verdict in the first screen, every picture loaded, no horizontal scroll at
1280 px, no absolute path of the machine and no internal name in the visible text. Skipped, with
the reason printed, where no Chromium is installed (``.ci/run`` installs Debian's package).
"""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from bench.cli import main

BROWSER = next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome") if shutil.which(n)), None)
pytestmark = pytest.mark.skipif(BROWSER is None, reason="no Chromium found: install Debian's 'chromium' "
                                                        "package to run the browser tests")

SEQUENCE = """
schema = 1
name = "browser-check"
[eut]
name = "test board"
revision = "A"
[sweeps.nf]
start = "30 MHz"
stop = "300 MHz"
rbw = "1 MHz"
points = 1001
[sweeps.cd]
start = "30 MHz"
stop = "300 MHz"
rbw = "120 kHz"
[[steps]]
kind = "grid"
label = "probe"
sweep = "nf"
probe = "hloop-10mm"
orientations = ["0 deg", "90 deg"]
area = { x = ["20 mm", "60 mm"], y = ["20 mm", "50 mm"] }
step_size = "10 mm"
height = "3 mm"
[[steps]]
kind = "prescan"
label = "prescan"
sweep = "cd"
heights = { from = "1 m", to = "2 m", step = "1 m" }
polarizations = ["horizontal", "vertical"]
azimuths = { from = "0 deg", to = "90 deg", step = "90 deg" }
limit = "cispr32-class-b-3m"
[[steps]]
kind = "final"
label = "final"
of = "prescan"
detectors = ["quasi-peak"]
dwell = "0.1 s"
"""

# Collects what a person sees once the page has loaded; written into the page for --dump-dom.
PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.from(document.images);
  var v = document.querySelector('.verdict');
  var out = {scroll_width: document.documentElement.scrollWidth, view_width: window.innerWidth,
             images: imgs.length,
             broken: imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); }).length,
             verdict_top: v ? v.getBoundingClientRect().top : -1, text: document.body.innerText};
  var pre = document.createElement('pre'); pre.id = 'probe-result'; pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


@pytest.fixture(scope="module")
def seen(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("browser")
    seq = tmp / "seq.toml"
    seq.write_text(SEQUENCE, encoding="utf-8")
    assert main(["run", str(seq), "--sim", "--out", str(tmp / "runs")]) == 0
    (folder,) = (tmp / "runs").iterdir()
    page = (folder / "report.html").read_text(encoding="utf-8")
    probe = tmp / "probe.html"
    probe.write_text(page.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    dom = subprocess.run([BROWSER, "--headless=new", "--no-sandbox", "--disable-gpu", "--window-size=1280,800",
                          "--virtual-time-budget=10000", "--dump-dom", probe.as_uri()],
                         capture_output=True, text=True, timeout=120).stdout
    match = re.search(r'<pre id="probe-result">(.*?)</pre>', dom, re.S)
    assert match, "the browser did not run the page"
    return folder, page, json.loads(html.unescape(match.group(1)))


def test_the_verdict_is_in_the_first_screen(seen):
    _, _, result = seen
    assert 0 <= result["verdict_top"] < 800  # the window is 800 px high
    first_line = result["text"].strip().splitlines()[0]
    assert first_line.startswith("Pre-scan report: test board rev A")


def test_every_picture_loads_and_nothing_scrolls_sideways(seen):
    _, _, result = seen
    assert result["images"] >= 4 and result["broken"] == 0  # spectra, maps, zooms
    assert result["scroll_width"] <= result["view_width"]


def test_no_absolute_path_and_no_internal_name(seen):
    folder, page, result = seen
    text = result["text"]
    assert str(folder.parent) not in page and str(Path.cwd()) not in text
    for name in ("dbuv_per_m", "dbua_per_m", "margin_db", "distance_m", "freq_hz", "rbw_hz"):
        assert name not in text, name
