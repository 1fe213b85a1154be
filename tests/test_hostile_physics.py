"""Extreme but valid physics through every command (issue 11), property-based.

Designs are drawn over the whole span the issue names: resonance ratio
fr/fs (filter alone) from 0.001 to 0.499, fs from 1 kHz to 500 kHz, a grid
inductance from 0 up to 100 x L1, Kp and Hi across four decades, P, PI and
PR controllers with resonators up to the 25th harmonic (those below fs/2),
computation delays of 0, 0.5 and 1 sample, grid- or converter-side feedback.

For each design:

- ``check --json`` is strict JSON (no NaN or Infinity token) whose verdict
  and spectral radius agree with the closed loop built independently with
  python-control (tests/reference_loop.py: circuit equations, python-control
  ``sample_system`` for the ZOH plant and each controller piece, ``feedback``
  for the loops; eigenvalues by numpy);
- ``map`` (small grid), ``grid``, ``pick`` (small), ``export``,
  ``simulate`` (short) and ``harmonics`` answer with exit 0 or 4 and strict
  JSON, or refuse with one line and exit 2 (a work limit, a resonator at
  fs/2); never a traceback. Every ``null`` in the output of ``harmonics``
  sits beside a stated reason (a note or a finding).

The designs are generated (invented). Hypothesis runs derandomized with few
examples so the file stays within well under a minute.
"""

from __future__ import annotations

import json
import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from loopcheck.io.casefile import case_from_string
from loopcheck.cli.main import app
from loopcheck.engine.verdict import TOLERANCE

from reference_loop import reference_loop, spectral_radius

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}


def few(n):
    return settings(derandomize=True, max_examples=n, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


def log_uniform(lo, hi):
    return st.floats(math.log10(lo), math.log10(hi)).map(lambda e: 10.0**e)


@st.composite
def extreme_cases(draw):
    """(case text, description) of a design at the edges of the valid span."""
    fs = draw(st.one_of(st.sampled_from([1e3, 500e3]), log_uniform(1e3, 500e3)))
    ratio = draw(st.one_of(st.sampled_from([0.001, 0.499]), st.floats(0.001, 0.499)))
    L1 = draw(log_uniform(20e-6, 20e-3))
    L2 = L1 * draw(log_uniform(0.05, 1.0))
    wr = 2 * math.pi * ratio * fs
    C = (L1 + L2) / (L1 * L2 * wr**2)
    if C > 0.1:  # a very low resonance: larger inductors keep C inside the accepted range (at most 1 F)
        L1, L2, C = L1 * C / 0.1, L2 * C / 0.1, 0.1
    lg_share = draw(st.one_of(st.just(0.0), st.just(100.0), log_uniform(1e-3, 100.0)))
    Lg = min(lg_share * L1, 10.0)  # the accepted grid inductances end at 10 H
    if 0 < Lg < 1e-9:
        Lg = 0.0
    R = draw(st.sampled_from([0.0, 0.01, 0.3]))
    f1 = 50.0
    Kp = (L1 + L2) * fs * draw(log_uniform(1e-4, 1.0))
    Hi = L1 * fs * draw(log_uniform(1e-4, 2.0)) * draw(st.sampled_from([1.0, 1.0, -1.0, 0.0]))
    kind = draw(st.sampled_from(["P", "PI", "PR"]))
    delay = draw(st.sampled_from([0.0, 0.5, 1.0]))
    feedback = draw(st.sampled_from(["grid", "converter"]))
    lines = [f"[filter]\nL1 = {L1!r}\nC = {C!r}\nL2 = {L2!r}\nR1 = {R!r}\nR2 = {R / 2!r}",
             f"[grid]\nf = {f1!r}\nLg = {Lg!r}\nLg_range = [0.0, {max(Lg, 1e-6)!r}]\nS = 30e3\nV = 400.0",
             f"[sampling]\nfs = {fs!r}\ndelay = {delay!r}",
             f'[control]\nfeedback = "{feedback}"\nkind = "{kind}"\nKp = {Kp!r}\nHi = {Hi!r}']
    if kind == "PI":
        Ki = Kp * 2 * math.pi * f1 * draw(log_uniform(0.01, 10.0))
        lines[-1] += f'\nKi = {Ki!r}\nintegrator = "{draw(st.sampled_from(["forward-euler", "backward-euler", "tustin"]))}"'
    if kind == "PR":
        Kr = Kp * 2 * math.pi * f1 * draw(log_uniform(0.01, 10.0))
        allowed = [h for h in range(2, 26) if h * f1 < 0.45 * fs]
        harmonics = sorted(draw(st.sets(st.sampled_from(allowed), max_size=min(12, len(allowed))))) if allowed else []
        if allowed and 25 in allowed and draw(st.booleans()):
            harmonics = sorted(set(harmonics[:11]) | {25})
        resonator = draw(st.sampled_from(["tustin-prewarp", "tustin", "zoh", "impulse-invariant"]))
        lines[-1] += f'\nKr = {Kr!r}\nharmonics = {harmonics!r}\nresonator = "{resonator}"'
    lines.append('[pwm]\ndc_link = "750 V"')
    text = 'name = "extreme physics"\n' + "\n".join(lines) + "\n"
    return text


def _strict(text: str) -> dict:
    """Parse one JSON object; NaN, Infinity and -Infinity tokens are errors."""
    def refuse(token):
        raise AssertionError(f"non-finite JSON token {token}")

    return json.loads(text, parse_constant=refuse)


def _finite_numbers(obj, path="$"):
    """Every number in the parsed JSON is finite (a float nan could also
    arrive as a huge literal that overflows; json gives inf for 1e999)."""
    if isinstance(obj, float):
        assert math.isfinite(obj), path
    elif isinstance(obj, dict):
        for k, v in obj.items():
            _finite_numbers(v, f"{path}.{k}")
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            _finite_numbers(v, f"{path}[{i}]")


def _run(tmp_path_factory, text, args):
    p = tmp_path_factory.mktemp("x") / "case.toml"
    p.write_text(text, encoding="utf-8")
    r = CliRunner().invoke(app, [args[0], str(p), *args[1:]], env=ENV)
    assert "Traceback" not in r.stderr, (text, r.stderr)
    assert r.exception is None or isinstance(r.exception, SystemExit), (text, r.stderr, repr(r.exception))
    if r.exit_code == 2:  # refused: one line naming the file (a work limit, a resonator at fs/2, ...)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: "), (text, r.stderr)
        return None
    assert r.exit_code in (0, 4), (text, r.exit_code, r.stdout, r.stderr)
    out = r.stdout.strip().splitlines()
    assert out, (text, r.stderr)
    doc = _strict(out[-1])
    _finite_numbers(doc)
    return doc


@few(20)
@given(text=extreme_cases())
def test_check_agrees_with_python_control_eigenvalues(tmp_path_factory, text):
    doc = _run(tmp_path_factory, text, ["check", "--json"])
    if doc is None:
        return
    design = case_from_string(text, "case.toml").design
    _, closed = reference_loop(design)
    ref = spectral_radius(closed)
    got = doc["spectral_radius"]
    assert math.isclose(got, ref, rel_tol=1e-6, abs_tol=1e-9), (text, got, ref)
    if abs(ref - 1.0) > 1e-6:  # away from the unit circle the call is unambiguous
        assert doc["verdict"] == ("stable" if ref < 1.0 - TOLERANCE else "unstable"), (text, doc["verdict"], ref)
        assert doc["stable"] == (ref < 1.0)


COMMANDS = {
    "map": ["--json", "--x-points", "4", "--y-points", "3", "-q"],
    "grid": ["--json", "--points", "3", "-q"],
    "pick": ["--json", "--points", "5", "--lg-points", "2", "-q", "--nominal-only"],
    "export": ["--json"],
    "simulate": ["--json", "--duration", "2 ms"],
    "harmonics": ["--json"],
}


def _nulls_with_reasons(doc, path="$"):
    """Paths of null values whose object states no reason beside them."""
    bad = []
    if isinstance(doc, dict):
        reasons = any(isinstance(v, (str, list)) and v and any(w in k for w in ("note", "reason", "finding", "why",
                                                                                 "warning", "verdict", "message"))
                      for k, v in doc.items())
        for k, v in doc.items():
            if v is None and not reasons:
                bad.append(f"{path}.{k}")
            bad += _nulls_with_reasons(v, f"{path}.{k}")
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            bad += _nulls_with_reasons(v, f"{path}[{i}]")
    return bad


@pytest.mark.parametrize("command", sorted(COMMANDS))
@few(4)
@given(text=extreme_cases())
def test_every_command_gives_finite_json_or_one_line(tmp_path_factory, command, text):
    doc = _run(tmp_path_factory, text, [command, *COMMANDS[command]])
    if doc is not None and command == "harmonics":
        assert not _nulls_with_reasons(doc), (text, _nulls_with_reasons(doc))


@few(3)
@given(text=extreme_cases())
def test_all_commands_on_one_extreme_design(tmp_path_factory, text):
    """The same design through all six commands; the firmware export's
    re-check of the exact coefficients gives check's verdict and radius."""
    check = _run(tmp_path_factory, text, ["check", "--json"])
    for command, args in COMMANDS.items():
        doc = _run(tmp_path_factory, text, [command, *args])
        if doc is None or check is None:
            continue
        if command == "harmonics":
            assert not _nulls_with_reasons(doc), (text, _nulls_with_reasons(doc))
        if command == "export":  # the exported controller re-checked with exact coefficients
            exact = doc["recheck"]["exact"]
            assert exact["verdict"] == check["verdict"], (text, exact, check["verdict"])
            assert math.isclose(exact["spectral_radius"], check["spectral_radius"], rel_tol=1e-9)
