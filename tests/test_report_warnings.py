"""The report carries every warning the commands print (issue 12 item 5).

Oracle: the commands' own output on the same case file (`loopcheck
harmonics` and `loopcheck simulate`), plus the closed-loop eigenvalue
verdict recomputed with the python-control reference of
tests/reference_loop.py (the sideband estimate presumes a stable loop:
common practice). The case is an invented demo scenario: the damping switched
off, so the loop is unstable and the simulated converter voltage runs past
the modulator's linear range.
"""

from __future__ import annotations

import html
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from reference_loop import reference_loop, spectral_radius

from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app

CASE = Path(__file__).resolve().parent.parent / "cases" / "commercial-30kva-undamped.toml"
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}


@pytest.fixture(scope="module")
def report_html():
    from loopcheck.figures.report import build_report

    return build_report(read_case(str(CASE))).html


def _section(doc: str, sid: str) -> str:
    m = re.search(rf"<section id='{sid}'.*?</section>", doc, flags=re.S)
    assert m, sid
    return html.unescape(re.sub(r"<[^>]+>", " ", m.group(0)))


def test_harmonics_section_warns_for_an_unstable_loop(report_html):
    _, cl = reference_loop(read_case(str(CASE)).design)
    assert spectral_radius(cl) > 1.0  # independently unstable
    sec = " ".join(_section(report_html, "harmonics").split())
    assert "within the limits" not in sec
    out = CliRunner().invoke(app, ["harmonics", str(CASE)], env=ENV).stdout
    warn = next(ln.split("WARNING: ", 1)[1] for ln in out.splitlines() if "WARNING: " in ln)
    assert warn in sec


def test_waveform_section_carries_the_saturation_note(report_html):
    out = CliRunner().invoke(app, ["simulate", str(CASE)], env=ENV).stdout
    notes = [ln.split("note: ", 1)[1] for ln in out.splitlines() if "note: " in ln and "linear range" in ln]
    assert notes
    sec = " ".join(_section(report_html, "waveforms").split())
    for n in notes:
        assert n in sec


def test_harmonics_command_gives_no_limit_verdict_for_an_unstable_loop():
    out = CliRunner().invoke(app, ["harmonics", str(CASE)], env=ENV).stdout
    worst = next(ln for ln in out.splitlines() if ln.strip().startswith("worst sideband:"))
    assert "within the limits" not in worst and "no verdict" in worst


def test_impedance_section_carries_the_impedance_command_verdicts():
    # the report's impedance section says what `loopcheck impedance` prints;
    # the eigenvalue verdict of the PFC demo is checked independently in
    # tests/test_range_verdict.py (python-control model with the bank's states)
    from loopcheck.figures.report import build_report

    pfc = Path(__file__).resolve().parent.parent / "cases" / "commercial-30kva-pfc-capacitor.toml"
    doc = build_report(read_case(str(pfc))).html
    sec = " ".join(_section(doc, "impedance").split())
    out = CliRunner().invoke(app, ["impedance", str(pfc)], env=ENV).stdout
    for key in ("impedance-ratio verdict", "eigenvalue verdict", "not passive"):
        line = " ".join(next(ln for ln in out.splitlines() if key in ln).split())
        assert line in sec, key
    assert "unstable, spectral radius" in sec
