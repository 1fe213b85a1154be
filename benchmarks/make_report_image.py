"""Make docs/images/report-overview.png: a screenshot of the top of a demo
report, rendered by headless Chromium (Debian: ``apt-get install -y chromium``).

Usage (from the repository root)::

    python benchmarks/make_report_image.py [CASE.toml] [-o docs/images/report-overview.png]

The report is built in a temporary directory; only the PNG is written (via a
temporary file and a rename).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

DEFAULT_CASE = ROOT / "cases" / "commercial-30kva-weak-grid.toml"
DEFAULT_OUT = ROOT / "docs" / "images" / "report-overview.png"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("case", nargs="?", default=str(DEFAULT_CASE))
    ap.add_argument("-o", "--output", default=str(DEFAULT_OUT))
    ap.add_argument("--width", type=int, default=1200, help="browser window width [px]")
    ap.add_argument("--height", type=int, default=1500, help="height of the captured top of the page [px]")
    args = ap.parse_args()

    chromium = shutil.which("chromium") or "/usr/bin/chromium"
    if not os.path.exists(chromium):
        print("chromium not found: apt-get install -y chromium", file=sys.stderr)
        return 2

    from loopcheck.io.casefile import read_case
    from loopcheck.figures.report import build_report

    # show the case path relative to the repository, never a machine path
    case = Path(args.case).resolve()
    out = Path(args.output).resolve()
    if case.is_relative_to(ROOT):
        os.chdir(ROOT)
        case = case.relative_to(ROOT)
    rep = build_report(read_case(str(case)))
    out.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        html = Path(tmp) / "report.html"
        html.write_text(rep.html, encoding="utf-8")
        shot = Path(tmp) / "shot.png"
        cmd = [
            chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--hide-scrollbars", "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={tmp}/profile",
            f"--window-size={args.width},{args.height}", f"--screenshot={shot}", html.as_uri(),
        ]
        subprocess.run(cmd, check=True, capture_output=True, timeout=120)
        tmp_out = out.with_name(f".{out.name}.tmp")
        shutil.copyfile(shot, tmp_out)
        os.replace(tmp_out, out)
    print(f"wrote {out} ({args.width} x {args.height} px) from {args.case} ({rep.verdict}, {rep.elapsed_s:.2f} s to build)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
