"""Render the design report in a real headless browser and inspect the page.

Uses Debian's Chromium (``/usr/bin/chromium``; install with
``apt-get install -y chromium``). Skipped only when that browser is absent.

Three renderings of one report (invented demo design):

* ``--dump-dom`` of a copy with a small check script appended (the report
  itself has no script): after the load event the script records how many
  images the browser decoded (``complete && naturalWidth > 0``), how many
  sections have a laid-out height, and how many network resources the page
  fetched (performance resource entries other than ``data:``). Host-name
  resolution is mapped to nothing, so a page that needed the network would
  show undecoded images.
* ``--screenshot`` of the report itself, checked to be a real, non-blank page.
* ``--print-to-pdf``: a PDF of more than one page.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from html.parser import HTMLParser

import pytest

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if os.path.exists("/usr/bin/chromium") else None)

pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed (apt-get install -y chromium)")

FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
    "--host-resolver-rules=MAP * ~NOTFOUND",
]

CHECK_SCRIPT = """
<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var decoded = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; });
  var b = document.body;
  b.setAttribute('data-images-total', String(imgs.length));
  b.setAttribute('data-images-decoded', String(decoded.length));
  b.setAttribute('data-images-widths', decoded.map(function (i) { return i.naturalWidth; }).join(','));
  var secs = Array.prototype.slice.call(document.querySelectorAll('section[id]'));
  b.setAttribute('data-sections-laid-out',
    secs.filter(function (s) { return s.getBoundingClientRect().height > 20; }).map(function (s) { return s.id; }).join(','));
  var fetched = performance.getEntriesByType('resource').filter(function (r) { return r.name.indexOf('data:') !== 0; });
  b.setAttribute('data-fetched', String(fetched.length));
  b.setAttribute('data-check', 'done');
});
</script>
"""


def _run(args, tmp_path, name):
    profile = tmp_path / f"profile-{name}"
    cmd = [CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args]
    res = subprocess.run(cmd, capture_output=True, timeout=120, env={**os.environ, "HOME": str(tmp_path)})
    return res


CASE_TEXT = """
name = "browser demo: 16 kHz PR, grid-side feedback"
description = "invented demo design for the browser test"
[filter]
L1 = "1.1 mH"
C  = "12 uF"
L2 = "0.45 mH"
R1 = "25 mOhm"
R2 = "15 mOhm"
[grid]
f  = "50 Hz"
Lg = "0.2 mH"
Lg_range = ["0 mH", "1 mH"]
S = "15 kVA"
V = "400 V"
[sampling]
fs = "16 kHz"
delay = 1
[control]
feedback = "grid"
kind = "PR"
Kp = "8 V/A"
Kr = "600 V/A/s"
harmonics = [5]
Hi = "9 V/A"
[pwm]
dc_link = "700 V"
"""


@pytest.fixture(scope="module")
def report_file(tmp_path_factory):
    """The report of an invented demo case, written by the real command."""
    from typer.testing import CliRunner

    from loopcheck.cli.main import app

    d = tmp_path_factory.mktemp("report")
    case = d / "browser-demo.toml"
    case.write_text(CASE_TEXT, encoding="utf-8")
    path = d / "report.html"
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(path), "-q"], env={"COLUMNS": "200", "NO_COLOR": "1"})
    assert res.exit_code == 0, res.output
    return path, path.read_text(encoding="utf-8")


class _Body(HTMLParser):
    def __init__(self):
        super().__init__()
        self.body: dict = {}
        self.sections: list[str] = []
        self.figures: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "body":
            self.body = a
        elif tag == "section":
            self.sections.append(a.get("id"))
        elif tag == "figure":
            self.figures.append(a.get("id"))


def test_browser_renders_every_section_and_decodes_every_image(report_file, tmp_path):
    from loopcheck.figures.report import SECTION_IDS

    path, html_text = report_file
    probe = tmp_path / "probe.html"
    probe.write_text(html_text.replace("</body>", CHECK_SCRIPT + "</body>"), encoding="utf-8")
    res = _run(["--virtual-time-budget=5000", "--dump-dom", probe.as_uri()], tmp_path, "dom")
    assert res.returncode == 0, res.stderr.decode(errors="replace")[-2000:]
    dom = res.stdout.decode("utf-8")
    scan = _Body()
    scan.feed(dom)
    b = scan.body
    assert b.get("data-check") == "done", "the load event never fired"
    assert scan.sections == list(SECTION_IDS)
    assert "fig-bode" in scan.figures and "fig-nyquist" in scan.figures
    total = int(b["data-images-total"])
    assert total >= 2 and int(b["data-images-decoded"]) == total
    assert all(int(w) >= 500 for w in b["data-images-widths"].split(","))
    assert b["data-sections-laid-out"].split(",") == list(SECTION_IDS)
    assert b["data-fetched"] == "0"
    # the rendered text carries the verdict in words and the safety cautions
    assert re.search(r">\s*STABLE\s*<", dom) or ">UNSTABLE<" in dom or ">MARGINAL<" in dom
    assert "lethal voltages" in dom and "interconnection rules" in dom


def test_browser_screenshot_is_a_real_page(report_file, tmp_path):
    from matplotlib import image as mpimg

    path, _ = report_file
    png = tmp_path / "shot.png"
    res = _run([f"--screenshot={png}", "--window-size=1200,3000", path.as_uri()], tmp_path, "shot")
    assert res.returncode == 0 and png.is_file(), res.stderr.decode(errors="replace")[-2000:]
    img = mpimg.imread(str(png))
    assert img.shape[0] == 3000 and img.shape[1] == 1200
    rgb = img[..., :3]
    assert float(rgb.std()) > 0.05  # not blank
    ink = (rgb.mean(axis=-1) < 0.6).mean()  # dark pixels: text, lines, curves
    assert 0.005 < ink < 0.5
    # the page renders content all the way down (figures and tables, not one block)
    for band in range(0, 3000, 600):
        assert float(rgb[band:band + 600].std()) > 0.02, band


def test_browser_prints_to_pdf_on_several_pages(report_file, tmp_path):
    path, _ = report_file
    pdf = tmp_path / "report.pdf"
    res = _run([f"--print-to-pdf={pdf}", "--no-pdf-header-footer", path.as_uri()], tmp_path, "pdf")
    assert res.returncode == 0 and pdf.is_file(), res.stderr.decode(errors="replace")[-2000:]
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF")
    pages = len(re.findall(rb"/Type\s*/Page(?![s\w])", data))
    assert pages > 1
