"""The README's promises: one opening paragraph stating the job, exactly two
one-line commands for a fresh machine, the second one run verbatim by
.ci/run, only existing commands documented, and a safety section."""

import os
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")
FENCE = re.compile(r"```[a-z]*\n(.*?)```", re.DOTALL)


def _intro() -> str:
    """Text between the title and the first second-level heading."""
    body = README.split("\n", 1)[1]
    return body.split("\n## ", 1)[0]


def _commands() -> list[str]:
    return [block.strip("\n") for block in FENCE.findall(_intro())]


def test_opens_with_one_paragraph_stating_the_job():
    first = _intro().strip().split("\n\n")[0]
    assert not first.startswith(("#", "```", "-", "|"))
    assert "\n" not in first.strip()
    assert len(first.split()) >= 40
    for word in ("LCL", "current loop", "grid-connected"):
        assert word in first


def test_exactly_two_one_line_commands():
    commands = _commands()
    assert len(commands) == 2
    assert all("\n" not in c for c in commands)
    install_demo, install_test = commands
    assert install_demo.startswith("python3 -m pip install .") and "loopcheck check cases/" in install_demo
    assert '".[test]"' in install_test and "pytest" in install_test


def test_demo_case_exists():
    demo = re.search(r"(cases/\S+\.toml)", _commands()[0]).group(1)
    assert (ROOT / demo).is_file()


def test_ci_runs_the_readme_test_command_verbatim():
    script = ROOT / ".ci" / "run"
    text = script.read_text(encoding="utf-8")
    assert os.access(script, os.X_OK)
    assert text.startswith("#!/usr/bin/env bash\n") and "set -euo pipefail" in text
    lines = [line.strip() for line in text.splitlines() if line.strip() and not line.startswith("#")]
    assert _commands()[1] in lines


def test_documented_commands_exist():
    from loopcheck.cli.main import app

    registered = {c.name for c in app.registered_commands}
    documented = set(re.findall(r"`loopcheck ([a-z]+) ", README))
    assert documented and documented <= registered


def test_safety_section():
    assert "\n## Safety\n" in README
    safety = README.split("\n## Safety\n", 1)[1].split("\n## ", 1)[0]
    for phrase in ("lethal voltages", "destroy hardware", "protection", "hardware tests",
                   "compliance testing", "licensed engineer", "interconnection rules"):
        assert phrase in safety
