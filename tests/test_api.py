"""The public Python API: the docs page's examples run as doctests, the
python-control objects it returns agree with loopcheck's own factored loop
gain, and the API stays lazy.

Oracle for the interop check: python-control's own frequency response of
the returned StateSpace objects (``StateSpace.__call__`` at z = e^{jwTs}),
compared with loopcheck's factored evaluation (controller blocks times the
plant, each in state space) to 1e-9 relative; T = L/(1+L) is the
unity-feedback closed loop (common practice).
"""

from __future__ import annotations

import doctest
import math
import os
import pkgutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import loopcheck as lc

REPO = Path(__file__).resolve().parent.parent


def test_api_page_examples_run(monkeypatch):
    monkeypatch.chdir(REPO)
    res = doctest.testfile(str(REPO / "docs" / "api.md"), module_relative=False, optionflags=doctest.ELLIPSIS)
    assert res.attempted >= 15 and res.failed == 0


@pytest.mark.parametrize("name", ["commercial-30kva-weak-grid.toml", "central-250kva-converter-side.toml",
                                  "bench-15kva-no-damping.toml"])
def test_control_systems_match_the_factored_loop(name):
    from loopcheck.engine.loop import build_loop

    case = lc.read_case(REPO / "cases" / name)
    L, T = lc.control_systems(case)
    fs = case.design.sampling.fs_hz
    f = np.concatenate([np.geomspace(1.0, fs / 2 * 0.999, 200), [fs / 2]])
    z = np.exp(2j * math.pi * f / fs)
    ours = build_loop(case.design).loop_response(z)
    theirs = np.array([complex(L(zz)) for zz in z])
    assert np.max(np.abs(theirs - ours) / np.maximum(np.abs(ours), 1e-12)) < 1e-9
    t = np.array([complex(T(zz)) for zz in z])
    assert np.max(np.abs(t - ours / (1 + ours)) / np.maximum(np.abs(t), 1e-12)) < 1e-9


def test_api_names_do_not_collide_with_modules_and_results_have_to_dict():
    modules = {m.name for m in pkgutil.iter_modules(lc.__path__)}
    assert not set(lc._API) & modules
    case = lc.read_case(REPO / "cases" / "residential-5kva-1ph.toml")
    for result in (lc.analyse(case), lc.verdict_over_range(case), lc.design_point_line(case)):
        d = result.to_dict()
        assert isinstance(d, dict) and d


def test_import_is_lazy():
    code = "import sys, loopcheck; print(any(m in sys.modules for m in ('numpy', 'scipy', 'control', 'matplotlib')))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=REPO,
                         env={**os.environ, "PYTHONPATH": str(REPO)})
    assert out.stdout.strip() == "False", out.stderr
