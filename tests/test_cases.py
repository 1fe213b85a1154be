"""Every demo case in cases/ loads, runs through ``loopcheck check`` and
gives the verdict its comment block promises (``# expect: <verdict>``).

The expected verdicts rest on the critical-frequency rule of the trade:
with one sample of computation delay, grid-current feedback without damping
is stable only for a resonance above fs/6, converter-current feedback only
below it, and capacitor-current feedback damps below fs/6 (S. G. Parker,
B. P. McGrath and D. G. Holmes, "Regions of Active Damping Control for LCL
Filters", IEEE Trans. Ind. Appl., vol. 50, no. 1, 2014 -- from memory), and
on the passive rule Rd near 1/(3*wr*C) for a series damping resistor
(Liserre, Dell'Aquila and Blaabjerg, IEEE Trans. Power Electron., vol. 19,
no. 1, 2004 -- from memory).
"""

import json
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app

CASES = sorted((Path(__file__).resolve().parent.parent / "cases").glob("*.toml"))
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
EXPECT = re.compile(r"^#\s*expect:\s*(stable|marginal|unstable)\s*$", re.MULTILINE)


def test_there_are_at_least_three_cases():
    assert len(CASES) >= 3


@pytest.mark.parametrize("path", CASES, ids=[p.name for p in CASES])
def test_case_has_a_comment_block_and_an_expectation(path):
    text = path.read_text(encoding="utf-8")
    head = []
    for line in text.splitlines():
        if not line.startswith("#"):
            break
        head.append(line)
    assert len(head) >= 5, "each case opens with a comment block explaining the scenario"
    assert len(EXPECT.findall("\n".join(head))) == 1


@pytest.mark.parametrize("path", CASES, ids=[p.name for p in CASES])
def test_case_runs_and_meets_its_expectation(path):
    expected = EXPECT.search(path.read_text(encoding="utf-8")).group(1)
    case = read_case(path)
    assert case.warnings == (), "demo cases should be plausible"
    result = CliRunner().invoke(app, ["check", str(path), "--json"], env=ENV)
    assert result.exit_code == 0, result.stderr
    record = json.loads(result.stdout)
    assert record["verdict"] == expected
    assert record["nyquist_consistent"] is True


def test_critical_frequency_side_of_the_instructive_cases():
    """The undamped designs fall on the side of fs/6 the rule predicts."""
    runner = CliRunner()
    out = {}
    for name in ("bench-15kva-no-damping", "commercial-30kva-undamped", "central-250kva-converter-side"):
        r = runner.invoke(app, ["check", str(CASES[0].parent / f"{name}.toml"), "--json"], env=ENV)
        out[name] = json.loads(r.stdout)
    # grid-current feedback, no damping: stable above fs/6, unstable below
    assert out["bench-15kva-no-damping"]["resonance_side"] == "above" and out["bench-15kva-no-damping"]["stable"]
    assert out["commercial-30kva-undamped"]["resonance_side"] == "below"
    assert not out["commercial-30kva-undamped"]["stable"]
    # converter-current feedback, no damping: stable below fs/6
    assert out["central-250kva-converter-side"]["resonance_side"] == "below"
    assert out["central-250kva-converter-side"]["stable"]
