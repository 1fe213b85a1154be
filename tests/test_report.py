"""The design report, its Bode and Nyquist figures and ``loopcheck report``.

The figures are checked against reference libraries (the plotted frequency
response against scipy.signal, the plotted Nyquist curve's encirclements
against python-control and against the closed-loop eigenvalues by the
argument principle), the HTML against its structural promises (every
section, figures embedded, nothing external, user text escaped, the safety
cautions). The real-browser check is in ``test_report_browser.py``.

All designs below are invented demo data.
"""

from __future__ import annotations

import base64
import io
import json
import math
import re
import warnings
from html.parser import HTMLParser

import numpy as np
import pytest
from typer.testing import CliRunner

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import case_from_string
from loopcheck.cli.main import app
from loopcheck.engine.loop import build_loop

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}

# Invented demo design: 20 kHz, grid-side PR with 5th and 7th resonators,
# capacitor-current damping. With Kp = 15 V/A and Hi = 16 V/A the damping
# loop has two poles outside the unit circle and the closed loop is
# nevertheless stable (two counter-clockwise encirclements).
DEMO = """
name = "demo 20 kHz PR"
description = "invented test design"
[filter]
L1 = "1.2 mH"
C  = "10 uF"
L2 = "0.5 mH"
{resist}
[grid]
f  = "50 Hz"
Lg = "0.3 mH"
{grid_extra}
[sampling]
fs = "20 kHz"
delay = 1
[control]
feedback = "grid"
kind = "{kind}"
Kp = "{kp} V/A"
Kr = "800 V/A/s"
harmonics = [5, 7]
Hi = "{hi} V/A"
{tables}
"""

# Optional tables for the sections of the other analyses (invented values).
FULL_GRID = 'S = "20 kVA"\nV = "400 V"\nLg_range = ["0 mH", "1.5 mH"]'
FULL_TABLES = """
[pwm]
dc_link = "720 V"

[firmware]
current_sensor = "25 mV/A"
ic_sensor = "40 mV/A"
adc_bits = 12
adc_full_scale = "3.3 V"
dc_link = "720 V"
pwm_period_counts = 2500
format = "Q3.28"
"""


def demo_text(kp=15, hi=16, kind="PR", resist="", grid_extra="", tables=""):
    return DEMO.format(kp=kp, hi=hi, kind=kind, resist=resist, grid_extra=grid_extra, tables=tables)


def demo_case(kp=15, hi=16, kind="PR", resist="", grid_extra="", tables=""):
    return case_from_string(demo_text(kp, hi, kind, resist, grid_extra, tables), "demo.toml")


# ---------------------------------------------------------------------------
# Bode figure
# ---------------------------------------------------------------------------


def test_bode_curve_matches_python_control_state_space_response():
    """The plotted loop gain equals the frequency response of the loop's
    series state space evaluated by python-control (reference library:
    python-control 0.10, StateSpace.__call__ on a discrete system, which
    evaluates C (zI - A)^-1 B + D without forming a polynomial).
    scipy.signal.dfreqresp is not used: it converts to a polynomial
    transfer function, which is exactly what loses accuracy at this order."""
    import control as ct

    from loopcheck.figures.bode_plot import sample_loop

    case = demo_case(resist='R1 = "50 mOhm"\nR2 = "40 mOhm"')
    d = case.design
    loop = build_loop(d)
    a = analyse(d)
    curve = sample_loop(loop, d, a)
    A, B, C = loop.open_loop()
    Ts = d.sampling.Ts_s
    sys = ct.ss(A, B, C, np.zeros((1, 1)), dt=Ts)
    f = curve.frequency_hz
    # away from the resonator poles
    pick = np.array([np.argmin(np.abs(f - x)) for x in (7.0, 120.0, 800.0, 1500.0, 2900.0, 6000.0, 9500.0)])
    z = curve.rho * np.exp(2j * math.pi * f[pick] * Ts)  # the plotted contour, 1e-7 outside the circle
    assert curve.rho - 1.0 < 1e-6
    ref = np.array([complex(np.squeeze(sys(zk))) for zk in z])
    np.testing.assert_allclose(curve.value[pick], ref, rtol=1e-5)
    # and the magnitude axis is 20*log10|L|, the frequency axis in Hz up to fs/2
    np.testing.assert_allclose(curve.magnitude_db[pick], 20 * np.log10(np.abs(ref)), atol=1e-4)
    assert f[-1] == pytest.approx(d.sampling.fs_hz / 2)


def test_bode_figure_marks_the_analysis_numbers():
    from loopcheck.figures.bode_plot import bode_figure, critical_label

    case = demo_case()
    d = case.design
    a = analyse(d)
    assert a.stable and a.open_loop_unstable_poles == 2  # the interesting kind of loop
    fig = bode_figure(d, a)
    texts = " | ".join(t.get_text() for ax in fig.axes for t in ax.texts)
    legend = " | ".join(t.get_text() for t in fig.legends[0].get_texts())
    for i, co in enumerate(a.crossovers, 1):
        assert f"gain crossover {i}:" in legend
        assert f"phase margin {abs(co.phase_margin_deg):.1f} deg ({co.reaches_minus1_with})" in legend
    for pc in a.phase_crossings:
        assert f"k={pc.factor:.3g}" in texts
    # the top axis names the resonance, the critical frequency and fs/2 at their frequencies
    top = fig.axes[0].child_axes
    assert top, "secondary axis with the named frequencies"
    ticks = list(top[0].get_xticks())
    labels = [t.get_text() for t in top[0].get_xticklabels()]
    fs = d.sampling.fs_hz
    # critical frequency fs/(4*delay+2), fs/6 for one sample of delay: Parker, McGrath and
    # Holmes, "Regions of Active Damping Control for LCL Filters", IEEE Trans. Ind. Appl.,
    # vol. 50, no. 1, 2014 (from memory)
    assert critical_label(1.0) == "fs/6" and "fs/6" in labels
    assert ticks[labels.index("fs/6")] == pytest.approx(fs / 6)
    assert ticks[labels.index("fs/2")] == pytest.approx(fs / 2)
    assert ticks[labels.index("f_res")] == pytest.approx(a.resonance_hz)
    # the frequency axis ends at the Nyquist frequency
    assert fig.axes[1].get_xlim()[1] == pytest.approx(fs / 2)


def test_bode_phase_is_odd_multiple_of_180_at_each_crossing():
    """Where L is real and negative its phase is an odd multiple of 180 deg
    (definition of the -180 deg crossing; common practice)."""
    from loopcheck.figures.bode_plot import sample_loop

    d = demo_case().design
    a = analyse(d)
    curve = sample_loop(build_loop(d), d, a)
    ph = curve.phase_unwrapped_deg
    for pc in a.phase_crossings:
        i = int(np.argmin(np.abs(curve.frequency_hz - pc.frequency_hz)))
        r = (ph[i] - 180.0) / 360.0
        assert abs(r - round(r)) * 360.0 < 0.5, (pc, ph[i])


# ---------------------------------------------------------------------------
# Nyquist figure
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("kp,hi", [(10, 12), (15, 16), (10, 4), (6, 16)])
def test_nyquist_curve_encirclements_match_python_control_and_eigenvalues(kp, hi):
    """Encirclements of -1 by the plotted curve (counter-clockwise) equal
    -count of python-control's nyquist_response (clockwise count, Z = N + P
    convention; python-control 0.10 documentation of nyquist_response) for
    loops without poles on the unit circle, and P - Z from the eigenvalues
    (argument principle: H. Nyquist, "Regeneration theory", Bell Syst. Tech.
    J., vol. 11, 1932)."""
    import control as ct

    from loopcheck.figures.nyquist_plot import sample_contour, winding_of_curve

    d = demo_case(kp=kp, hi=hi, kind="P", resist='R1 = "50 mOhm"\nR2 = "40 mOhm"').design
    a = analyse(d)
    assert a.open_loop_circle_poles == 0
    loop = build_loop(d)
    curve = sample_contour(loop, d, a)
    n_plot = winding_of_curve(curve)
    assert abs(n_plot - round(n_plot)) < 1e-6
    A, B, C = loop.open_loop()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = ct.nyquist_response(ct.ss(A, B, C, 0, dt=d.sampling.Ts_s), omega_num=20000)
    assert round(n_plot) == -ref.count
    A_cl = A - B @ C
    Z = int(np.sum(np.abs(np.linalg.eigvals(A_cl)) > 1))
    P = int(np.sum(np.abs(np.linalg.eigvals(A)) > 1))
    assert round(n_plot) == P - Z
    assert round(n_plot) == a.nyquist_encirclements


def test_nyquist_curve_with_circle_poles_agrees_with_the_count():
    """With ideal resonators and a lossless filter (poles on the unit circle)
    the drawn contour passes outside them; its winding still equals P - Z
    from the eigenvalues."""
    from loopcheck.figures.nyquist_plot import sample_contour, winding_of_curve

    for kp, hi in [(15, 16), (10, 4)]:
        d = demo_case(kp=kp, hi=hi).design
        a = analyse(d)
        assert a.open_loop_circle_poles > 0
        curve = sample_contour(build_loop(d), d, a)
        assert round(winding_of_curve(curve)) == a.open_loop_unstable_poles - a.closed_loop_unstable_poles


def test_nyquist_figure_states_P_N_Z():
    from loopcheck.figures.nyquist_plot import nyquist_figure

    d = demo_case().design
    a = analyse(d)
    fig = nyquist_figure(d, a)
    texts = "\n".join(t.get_text() for ax in fig.axes for t in ax.texts)
    assert "P = 2" in texts and "N = 2" in texts and "Z = 0" in texts
    assert "N = P - Z holds" in texts
    ax = fig.axes[0]
    assert ax.get_xlim()[0] < -1 < ax.get_xlim()[1]  # zoomed around -1
    labels = [h.get_label() for h in ax.get_lines()]
    assert "critical point -1" in labels and "unit circle |L| = 1" in labels
    assert any("mirror branch" in s for s in labels)
    assert len(fig.axes) == 2  # compressed full view on by default
    assert len(nyquist_figure(d, a, full_view=False).axes) == 1


# ---------------------------------------------------------------------------
# the HTML
# ---------------------------------------------------------------------------


class _Scan(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


@pytest.fixture(scope="module")
def built():
    from loopcheck.figures.report import build_report

    case = demo_case(grid_extra=FULL_GRID, tables=FULL_TABLES)
    msgs: list[str] = []
    rep = build_report(case, progress=msgs.append)
    return case, rep, msgs


def test_report_has_every_section_and_figure(built):
    from loopcheck.figures.report import SECTION_IDS

    _, rep, msgs = built
    scan = _Scan()
    scan.feed(rep.html)
    ids = [a.get("id") for t, a in scan.tags if t == "section"]
    assert ids == list(SECTION_IDS)
    for sid in ("job", "inputs", "verdict", "frequency", "map", "weakgrid", "gains", "waveforms",
                "harmonics", "assumptions", "safety"):
        assert sid in ids
    figs = [a.get("id") for t, a in scan.tags if t == "figure"]
    assert "fig-bode" in figs and "fig-nyquist" in figs
    imgs = [a for t, a in scan.tags if t == "img"]
    assert len(imgs) >= 2
    from matplotlib import image as mpimg

    for a in imgs:
        src = a["src"]
        assert src.startswith("data:image/png;base64,")
        png = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
        arr = mpimg.imread(io.BytesIO(png), format="png")
        assert arr.shape[0] > 300 and arr.shape[1] > 500 and float(arr.std()) > 0.05
        assert a.get("alt")
    assert msgs and msgs[0] == "analysis"  # progress went through the callback


def _section(html_text, sid):
    return re.search(rf"<section id='{sid}'.*?</section>", html_text, flags=re.S).group(0)


def test_report_sections_of_the_other_analyses_carry_their_results(built):
    """The waveform, harmonic and firmware sections show what their modules
    compute for this case (wiring: the numbers are theirs, not the report's).
    Every section is checked unconditionally: all the modules exist, so a
    missing section is a failure, not a skip."""
    case, rep, _ = built
    d = case.design
    from loopcheck.io.read_scenario import parse_scenario
    from loopcheck.timedomain.simulate import resonance_rate_check

    sec = _section(rep.html, "waveforms")
    assert "id='fig-waveforms'" in sec
    sc = parse_scenario(case.tables.get("scenario"), case.where("scenario"))
    rc = resonance_rate_check(d, sc)
    assert f"<td class='n'>design</td><td class='n'>{rc.simulated_rate_per_s:.5g}</td><td class='n'>{rc.predicted_rate_per_s:.5g}</td>" in sec
    assert "<td class='n'>Hi = 0</td>" in sec  # the undamped loop beside the damped one

    sec = _section(rep.html, "harmonics")
    assert "id='fig-harmonics'" in sec and "IEEE Std 519" in sec and "Worst sideband" in sec

    sec = _section(rep.html, "map")
    assert "id='fig-map'" in sec
    # the map's own verdict at the design point agrees with the eigenvalue verdict
    said = "<strong>stable</strong>" if analyse(d).stable else "<strong>not stable</strong>"
    assert said in sec

    sec = _section(rep.html, "weakgrid")
    assert "id='fig-weakgrid'" in sec and "Stable Lg intervals" in sec
    assert "<td class='n'>0 H</td>" in sec and "<td class='n'>1.5 mH</td>" in sec  # both ends of the range

    sec = _section(rep.html, "gains")
    assert "id='fig-pick'" in sec and "Hi interval meeting the targets" in sec
    from loopcheck.design.firmware import controller_sections

    si = controller_sections(d)
    for part in si.sections:
        assert f"<td class='n'>{part.name}</td>" in sec
        for x in part.b + part.a:
            assert f">{x:.10g}</td>" in sec
    assert "Stored coefficients (fixed, 32 bits)" in sec
    assert "Re-check of the loop" in sec


def test_report_loads_nothing_external_and_runs_no_script(built):
    _, rep, _ = built
    scan = _Scan()
    scan.feed(rep.html)
    tagnames = {t for t, _ in scan.tags}
    assert not tagnames & {"script", "link", "iframe", "object", "embed", "base"}
    for _, attrs in scan.tags:
        for k in ("src", "href", "srcset", "poster", "data", "action"):
            v = attrs.get(k)
            if v is not None:
                assert v.startswith("data:") or v.startswith("#"), (k, v[:60])
        assert not any(k.startswith("on") for k in attrs)  # no inline event handlers
    styles = re.findall(r"<style>(.*?)</style>", rep.html, flags=re.S)
    assert styles and all("@import" not in s and "url(" not in s for s in styles)


def test_report_verdict_margins_and_counts(built):
    _, rep, _ = built
    a = analyse(demo_case().design)
    h = rep.html
    assert rep.verdict == a.verdict == "stable"
    # stable at the nominal Lg, but the case's Lg range 0..1.5 mH starts with
    # 0..38 uH where the loop is unstable (the python-control reference of
    # tests/reference_loop.py gives spectral radius 1.005 at Lg = 0 and
    # 1.00005 at 38 uH): the banner says so, in words, not colour alone
    assert "class='banner banner-unstable'" in h and ">NOT STABLE OVER ITS RANGE<" in h
    assert "NOT STABLE over 0 H .. 38.36 uH" in h
    assert f"{a.spectral_radius:.6f}" in h
    for co in a.crossovers:
        assert f"{abs(co.phase_margin_deg):.2f}" in h
    assert f"P = {a.open_loop_unstable_poles}, N = {a.nyquist_encirclements}, Z = {a.closed_loop_unstable_poles}" in h
    assert "Hz" in h and "[deg]" in h and "[dB]" in h  # units in the table headers


def test_report_unavailable_sections_say_so(built):
    _, rep, _ = built
    for s in rep.sections:
        block = re.search(rf"<section id='{s.id}'[^>]*data-state='(\w+)'>(.*?)</section>", rep.html, flags=re.S)
        assert block, s.id
        state, body = block.groups()
        if s.available:  # real content (parts of it may still say what is missing)
            assert state == "ok" and ("<table" in body or "<figure" in body or "<ul" in body or "<p>" in body)
        else:
            assert state == "na" and ("Not available in this version" in body or "Not computed" in body)


def test_report_safety_cautions(built):
    _, rep, _ = built
    safety = re.search(r"<section id='safety'.*?</section>", rep.html, flags=re.S).group(0)
    for phrase in ("lethal voltages", "destroy hardware", "does not replace hardware protection",
                   "grid-code compliance", "licensed engineer", "interconnection rules"):
        assert phrase in safety, phrase
    top = rep.html.split("<nav", 1)[0]
    assert "lethal voltages" in top  # the short caution stands above the contents too


def test_report_escapes_user_text(monkeypatch):
    import loopcheck.figures.report as rp
    from loopcheck.figures.report import build_report

    # user text sits in the header, the job and the inputs; skip the long analyses
    keep = {"job", "inputs", "verdict", "safety"}
    monkeypatch.setattr(rp, "SECTION_BUILDERS", tuple(b for b in rp.SECTION_BUILDERS if b[0] in keep))

    text = demo_text(kp=10, hi=12).replace(
        'name = "demo 20 kHz PR"', 'name = "<script>alert(1)</script> & <b>x</b>"'
    ).replace('description = "invented test design"', 'description = "a <img src=x onerror=y> \\"q\\""')
    text += '\n[report]\ntitle = "T <i>1</i>"\nprepared_by = "A & B <c>"\n'
    case = case_from_string(text, "evil <dir>/case.toml")
    h = build_report(case).html
    assert "<script>" not in h and "<img src=x" not in h and "<i>1</i>" not in h and "<c>" not in h
    assert "&lt;script&gt;alert(1)&lt;/script&gt; &amp; &lt;b&gt;x&lt;/b&gt;" in h
    assert "A &amp; B &lt;c&gt;" in h
    assert "evil &lt;dir&gt;/case.toml" in h


# ---------------------------------------------------------------------------
# the command
# ---------------------------------------------------------------------------


def _write_case(tmp_path, text=None, name="case.toml"):
    p = tmp_path / name
    p.write_text(text if text is not None else demo_text(kp=10, hi=12))
    return p


def test_cli_report_writes_one_file(tmp_path, monkeypatch):
    import loopcheck.figures.report as rp

    # the command's wiring; the full build through the command runs in test_report_browser.py
    keep = {"job", "inputs", "verdict", "frequency", "safety"}
    monkeypatch.setattr(rp, "SECTION_BUILDERS", tuple(b for b in rp.SECTION_BUILDERS if b[0] in keep))
    case = _write_case(tmp_path)
    out = tmp_path / "out" / "r.html"
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(out), "--quiet"], env=ENV)
    assert res.exit_code == 0, res.output
    assert out.is_file() and out.read_text().startswith("<!DOCTYPE html>")
    assert res.stdout.startswith(f"wrote {out} (stable")
    assert [p.name for p in out.parent.iterdir()] == ["r.html"]  # no temporary left behind


def test_cli_report_json(tmp_path, monkeypatch, built):
    import loopcheck.figures.report as rp

    _, rep, _ = built
    monkeypatch.setattr(rp, "build_report", lambda *a, **k: rep)  # the JSON shape only; the build is tested above
    case = _write_case(tmp_path)
    out = tmp_path / "r.html"
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(out), "--json", "-q"], env=ENV)
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["verdict"] == "stable" and data["report"] == str(out)
    assert "frequency" in data["sections"] and "safety" in data["sections"]
    assert set(data["not_available"]) <= set(data["sections"])


@pytest.mark.parametrize(
    "change,needle",
    [
        (('C  = "10 uF"', 'C  = "10 mH"'), "C"),
        (("[sampling]", '[report]\ncolour = "red"\n[sampling]'), "colour"),
        (("[sampling]", '[pwm]\ndc_lnk = "700 V"\n[sampling]'), "dc_lnk"),
    ],
)
def test_cli_report_bad_input_is_one_line_exit_2(tmp_path, change, needle):
    text = demo_text(kp=10, hi=12).replace(*change)
    case = _write_case(tmp_path, text)
    out = tmp_path / "r.html"
    out.write_text("previous")
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(out)], env=ENV)
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and str(case) in lines[0] and needle in lines[0]
    assert "Traceback" not in res.output
    assert out.read_text() == "previous"  # nothing overwritten


def test_cli_report_output_is_a_directory(tmp_path):
    case = _write_case(tmp_path)
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(tmp_path)], env=ENV)
    assert res.exit_code == 2 and "is a directory" in res.stderr


def test_cli_report_needs_an_html_name(tmp_path):
    # an HTML document written under a .pdf name would mislead; say how to get a PDF instead
    case = _write_case(tmp_path)
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(tmp_path / "r.pdf")], env=ENV)
    assert res.exit_code == 2 and "use a name ending in .html" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1 and not (tmp_path / "r.pdf").exists()


def test_cli_report_failure_leaves_no_file(tmp_path, monkeypatch):
    import loopcheck.figures.report as rp

    def boom(*args, **kwargs):
        raise RuntimeError("simulated failure while building")

    monkeypatch.setattr(rp, "build_report", boom)
    case = _write_case(tmp_path)
    out = tmp_path / "r.html"
    res = CliRunner().invoke(app, ["report", str(case), "-o", str(out)], env=ENV)
    assert res.exit_code != 0
    assert not out.exists() and list(tmp_path.iterdir()) == [case]
