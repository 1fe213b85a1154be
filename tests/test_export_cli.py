"""``loopcheck export`` end to end: the command, the C header compiled and
run by gcc against the Python equations and scipy, the JSON, the errors,
and the worked example of docs/firmware.md.

The case files are invented scenarios (demo values only)."""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import scipy.signal as ss
from typer.testing import CliRunner

from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app
from loopcheck.design.firmware import export_controller, run_difference_equations
from loopcheck.io.read_firmware import read_firmware_settings

ROOT = Path(__file__).resolve().parent.parent
DOC = (ROOT / "docs" / "firmware.md").read_text(encoding="utf-8")
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
GCC = shutil.which("gcc")
needs_gcc = pytest.mark.skipif(GCC is None, reason="gcc not installed")
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror", "-ffp-contract=off"]


def doc_block(lang: str, index: int = 0) -> str:
    return re.findall(rf"```{lang}\n(.*?)```", DOC, re.DOTALL)[index]


#: The worked-example case of docs/firmware.md (an invented 10 kVA inverter).
DEMO_TOML = doc_block("toml")


def write_case(tmp_path: Path, text: str = DEMO_TOML, name: str = "export-demo.toml") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def with_firmware(text: str, **changes) -> str:
    """The demo case with [firmware] keys replaced, added or (value None) removed."""
    head, fw = text.split("[firmware]\n")
    lines = [ln for ln in fw.splitlines() if ln.strip() and ln.split("=")[0].strip() not in changes]
    for k, v in changes.items():
        if v is not None:
            lines.append(f"{k} = {json.dumps(v)}")
    return head + "[firmware]\n" + "\n".join(lines) + "\n"


def run(*args):
    return CliRunner().invoke(app, ["export", *map(str, args)], env=ENV)


# ---------------------------------------------------------------------------
# the command
# ---------------------------------------------------------------------------


def test_summary_and_files(tmp_path):
    case = write_case(tmp_path)
    out = tmp_path / "build"
    r = run(case, "-o", out)
    assert r.exit_code == 0, r.stderr
    assert sorted(os.listdir(out)) == ["export-demo_controller.h", "export-demo_controller.json"]  # no temp files left
    for text in ("direct form I", "Kp 8, Hi 12", "Q2.29", "re-check", "stable", "licensed engineer"):
        assert text in r.stdout
    assert r.stderr == ""
    doc = json.loads((out / "export-demo_controller.json").read_text())
    assert doc["stored"]["sections"][0]["a"][0]["integer"] == -1073609359
    assert doc["recheck"]["stored"]["stable"] is True
    assert doc["files"]["C header"].endswith("export-demo_controller.h")


def test_json_on_stdout_matches_the_library(tmp_path):
    case = write_case(tmp_path)
    r = run(case, "--json")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    c = read_case(case)
    settings, _ = read_firmware_settings(c.tables["firmware"], c.where("firmware"))
    ex = export_controller(c.design, settings)
    assert doc["si"]["Kp"] == 8.0 and doc["si"]["Hi"] == 12.0
    assert doc["firmware_units"]["Kp"] == ex.firmware.Kp
    assert [s["name"] for s in doc["si"]["sections"]] == ["R1", "R5", "R7"]
    assert doc["si"]["sections"][0]["a"] == list(ex.si.sections[0].a)
    assert doc["number_format"]["label"] == "Q2.29" and doc["number_format"]["c_type"] == "int32_t"
    assert doc["recheck"]["exact"]["phase_margin_deg"] == pytest.approx(ex.recheck.before.phase_margin_deg)
    assert doc["cautions"] and doc["equations"]["form"] == "direct form I"
    assert not (tmp_path / "build").exists()  # --json alone writes no files


def test_without_firmware_table_exports_si_only(tmp_path):
    case = write_case(tmp_path, DEMO_TOML.split("[firmware]")[0])
    r = run(case, "--json")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    assert doc["scaling"] is None and doc["firmware_units"] is None
    assert doc["number_format"]["kind"] == "float64" and doc["recheck"]["stored"] is None


def test_bad_firmware_key_is_one_line_exit_2_and_writes_nothing(tmp_path):
    case = write_case(tmp_path, with_firmware(DEMO_TOML, formt="Q2.13"))
    r = run(case, "-o", tmp_path / "build")
    assert r.exit_code == 2
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert f"{case}: [firmware] formt: unknown key; did you mean \"format\"?" in r.stderr
    assert not (tmp_path / "build").exists()


def test_format_too_narrow_is_bad_input(tmp_path):
    case = write_case(tmp_path, with_firmware(DEMO_TOML, format="Q0.15"))
    r = run(case)
    assert r.exit_code == 2
    assert "[firmware] format:" in r.stderr and "does not fit Q0.15" in r.stderr and "integer bits" in r.stderr


def test_out_dir_and_header_are_exclusive(tmp_path):
    case = write_case(tmp_path)
    r = run(case, "-o", tmp_path, "--header", tmp_path / "x.h")
    assert r.exit_code == 2 and "not both" in r.stderr


def test_help_names_the_outputs():
    r = CliRunner().invoke(app, ["export", "--help"], env=ENV)
    assert r.exit_code == 0
    for opt in ("--out-dir", "--header", "--json-out", "--json", "--fail-on-unstable"):
        assert opt in r.stdout


# ---------------------------------------------------------------------------
# the C header, compiled and run
# ---------------------------------------------------------------------------


def _compile_and_run(tmp_path: Path, source: str, *extra_flags: str) -> list[float]:
    c = tmp_path / "prog.c"
    exe = tmp_path / "prog"
    c.write_text(source)
    subprocess.run([GCC, *CFLAGS, *extra_flags, "-I", str(tmp_path), str(c), "-o", str(exe), "-lm"], check=True,
                   capture_output=True, text=True)
    out = subprocess.run([str(exe)], check=True, capture_output=True, text=True).stdout
    return [float(x) for x in out.split()]


def _syntax_check(tmp_path: Path, header: str, *extra_flags: str) -> subprocess.CompletedProcess:
    """Compile a translation unit that only includes the header."""
    c = tmp_path / "only_header.c"
    c.write_text(f'#include "{header}"\nint main(void) {{ return 0; }}\n')
    return subprocess.run([GCC, *CFLAGS, *extra_flags, "-fsyntax-only", "-I", str(tmp_path), str(c)],
                          capture_output=True, text=True)


def _inputs(n=800):
    """Test signals in ADC counts: a 50 Hz error plus noise, and noise on ic."""
    rng = np.random.default_rng(11)
    k = np.arange(n)
    e = 40.0 * np.sin(2 * np.pi * 50 * k / 20e3) + 5.0 * rng.standard_normal(n)
    ic = 8.0 * rng.standard_normal(n)
    return e, ic


def _c_array(name, xs):
    return f"static const double {name}[] = {{ {', '.join(repr(float(x)) for x in xs)} }};\n"


@needs_gcc
def test_doc_reference_implementation_runs_the_exported_equations(tmp_path):
    # gcc compiles the header (C99, -Wall -Wextra -pedantic -Werror) and the
    # reference implementation printed in docs/firmware.md; its output must equal
    # the Python implementation of the same equations and scipy.signal.lfilter
    # on the exported coefficients (an independent direct-form filter).
    case = write_case(tmp_path)
    assert run(case, "-o", tmp_path).exit_code == 0
    e, ic = _inputs()
    ref_impl = doc_block("c")
    main = (
        _c_array("E", e)
        + _c_array("IC", ic)
        + "#include <stdio.h>\nint main(void) {\n  inv_state s = {0};\n  unsigned k;\n"
        "  for (k = 0; k < sizeof E / sizeof E[0]; ++k) printf(\"%.17g\\n\", inv_step(&s, E[k], IC[k]));\n"
        "  return 0;\n}\n"
    )
    u_c = np.array(_compile_and_run(tmp_path, ref_impl + main))

    c = read_case(case)
    settings, _ = read_firmware_settings(c.tables["firmware"], c.where("firmware"))
    ex = export_controller(c.design, settings)
    stored = ex.quantised.as_coefficients()
    u_py = run_difference_equations(stored, e, ic)
    np.testing.assert_allclose(u_c, u_py, rtol=0, atol=1e-12 * np.max(np.abs(u_py)))
    lf = stored.Kp * e - stored.Hi * ic
    for s in stored.sections:
        lf = lf + ss.lfilter(s.b, (1.0,) + s.a, e)
    np.testing.assert_allclose(u_c, lf, rtol=0, atol=1e-9 * np.max(np.abs(lf)))


@needs_gcc
def test_integer_constants_are_the_stored_values(tmp_path):
    # every *_Q integer divided by 2^Q_FRACTION_BITS must equal the stored real
    # value (and the exact value within half an LSB for round-to-nearest)
    case = write_case(tmp_path)
    assert run(case, "--header", tmp_path / "h.h").exit_code == 0
    prog = """#include <stdio.h>
#include "h.h"
static const int32_t b0q[] = INV_SEC_B0_Q, a1q[] = INV_SEC_A1_Q, a2q[] = INV_SEC_A2_Q;
static const double b0[] = INV_SEC_B0, a1[] = INV_SEC_A1, a2[] = INV_SEC_A2;
int main(void) {
  int j; double lsb = 1.0 / (double)(1L << INV_Q_FRACTION_BITS);
  printf("%.17g %.17g %.17g\\n", INV_KP_Q * lsb - INV_KP, INV_HI_Q * lsb - INV_HI, fabs(INV_KP - INV_KP_FW) / lsb);
  for (j = 0; j < INV_SECTION_COUNT; ++j)
    printf("%.17g %.17g %.17g\\n", b0q[j] * lsb - b0[j], a1q[j] * lsb - a1[j], a2q[j] * lsb - a2[j]);
  printf("%.17g %.17g\\n", fabs(INV_R1_A1_Q * lsb - INV_R1_A1) / lsb, fabs(INV_R5_B0_Q * lsb - INV_R5_B0_FW) / lsb);
  return 0;
}
"""
    vals = _compile_and_run(tmp_path, "#include <math.h>\n" + prog)
    exact_diffs = vals[:2] + vals[3:-2]
    assert all(v == 0.0 for v in exact_diffs)
    assert vals[2] <= 0.5 and vals[-2] <= 0.5 and vals[-1] <= 0.5


@needs_gcc
def test_float32_header_compiles_and_holds_float32_values(tmp_path):
    case = write_case(tmp_path, with_firmware(DEMO_TOML, format="float32"))
    assert run(case, "--header", tmp_path / "f.h").exit_code == 0
    text = (tmp_path / "f.h").read_text()
    assert "#include <stdint.h>" not in text
    prog = """#include <stdio.h>
#include "f.h"
static const float a1[] = INV_SEC_A1;
int main(void) { int j; for (j = 0; j < INV_SECTION_COUNT; ++j) printf("%.17g\\n", (double)a1[j]); return 0; }
"""
    vals = _compile_and_run(tmp_path, prog)
    c = read_case(case)
    expect = [float(np.float32(s.a[0])) for s in export_controller(c.design).si.sections]
    assert vals == expect


@needs_gcc
def test_pi_header_in_si_compiles(tmp_path):
    text = DEMO_TOML.split("[firmware]")[0].replace('kind = "PR"', 'kind = "PI"\nKi = "2000 V/A/s"\nintegrator = "tustin"')
    text = text.replace('Kr = "200 V/A/s"\n', "").replace("harmonics = [5, 7]\n", "")
    case = write_case(tmp_path, text)
    r = run(case, "--header", tmp_path / "pi.h")
    assert r.exit_code == 0, r.stderr
    h = (tmp_path / "pi.h").read_text()
    assert "#define LC_I_B0_V_PER_A 0.05 " in h  # Ki*Ts/2 = 2000 * 50e-6 / 2
    r = _syntax_check(tmp_path, "pi.h")
    assert r.returncode == 0, r.stderr


@needs_gcc
def test_unstable_stored_loop_refuses_to_compile_and_exits_4(tmp_path):
    # Q5.10 rounds the 50 Hz resonator's a1 to -2 and a2 to 1: a double pole at
    # z = 1 with one pole cancelled by the numerator zero leaves a closed-loop
    # pole at 1 (marginal), so the stored controller must not be built.
    case = write_case(tmp_path, with_firmware(DEMO_TOML, format="Q5.10"))
    r = run(case, "--header", tmp_path / "u.h", "--fail-on-unstable")
    assert r.exit_code == 4
    assert "resonance is lost" in r.stdout and "do not run this controller" in r.stdout
    bad = _syntax_check(tmp_path, "u.h")
    assert bad.returncode != 0 and "MARGINAL" in bad.stderr
    ok = _syntax_check(tmp_path, "u.h", "-DINV_ALLOW_UNSTABLE")
    assert ok.returncode == 0, ok.stderr


# ---------------------------------------------------------------------------
# the worked example in the docs
# ---------------------------------------------------------------------------


def test_doc_header_excerpt_is_what_the_export_writes(tmp_path):
    case = write_case(tmp_path)
    assert run(case, "-o", tmp_path).exit_code == 0
    header = (tmp_path / "export-demo_controller.h").read_text().splitlines()
    excerpt = doc_block("text").strip().splitlines()
    for line in excerpt:
        assert line in header, line


def test_doc_hand_calculation_matches(tmp_path):
    # the by-hand numbers of the worked example: a1 = -2 cos(w0 Ts),
    # b0 = Kr sin(w0 Ts)/(2 w0) for the prewarped ideal resonator
    c = read_case(write_case(tmp_path))
    s = export_controller(c.design).si.sections[0]
    w0, Ts = 2 * math.pi * 50, 50e-6
    assert s.a[0] == pytest.approx(-2 * math.cos(w0 * Ts), rel=1e-15)
    assert s.b[0] == pytest.approx(200 * math.sin(w0 * Ts) / (2 * w0), rel=1e-12)
    for text in ("-1.9997532650", "0.0049997944", "-1073609359", "49.7364 Hz", "251.2193 Hz"):
        assert text in DOC


def test_doc_q2_13_statements(tmp_path):
    case = write_case(tmp_path, with_firmware(DEMO_TOML, format="Q2.13"))
    r = run(case)
    assert r.exit_code == 0
    assert "49.7364 Hz" in r.stdout and "251.2193 Hz" in r.stdout and "0.0149" in r.stdout


def test_unstable_design_is_flagged_even_without_quantisation(tmp_path):
    # Hi = 1 V/A is too little damping for this filter (resonance below fs/6 with
    # grid-current feedback): the closed-loop eigenvalues say unstable.
    text = DEMO_TOML.split("[firmware]")[0].replace('Hi = "12 V/A"', 'Hi = "1 V/A"')
    case = write_case(tmp_path, text)
    r = run(case, "--header", tmp_path / "x.h")
    assert r.exit_code == 0 and "the design itself is UNSTABLE" in r.stdout
    assert "#error" in (tmp_path / "x.h").read_text()
    assert run(case, "--fail-on-unstable").exit_code == 4


def test_missing_capacitor_current_scaling_is_warned(tmp_path):
    case = write_case(tmp_path, with_firmware(DEMO_TOML, ic_sensor=None))
    r = run(case)
    assert r.exit_code == 0
    assert "[firmware] ic_sensor: not given" in r.stderr
