"""The README's two fresh-machine commands stay true: CI runs the same test command, and
the demo command is the one tests/test_demo.py runs."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _fresh_machine_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    section = text.split("## Fresh machine", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```sh\n(.*?)\n```", section, flags=re.S)


def test_readme_has_the_two_commands() -> None:
    """First: set up and run the demo; second: set up and run the tests."""
    demo, tests = _fresh_machine_commands()[:2]
    assert demo.startswith("python3 -m venv .venv") and demo.endswith("streamgroup demo")
    assert "pip install -e ." in demo
    assert tests.startswith("python3 -m venv .venv") and "pip install -e '.[test]'" in tests


def test_ci_runs_exactly_the_readme_test_command() -> None:
    """.ci/run installs the test extra and ends with the README's pytest command."""
    tests = _fresh_machine_commands()[1]
    pytest_cmd = tests.split("&&")[-1].strip()
    ci = [line.strip() for line in (ROOT / ".ci" / "run").read_text().splitlines()
          if line.strip() and not line.lstrip().startswith("#")]
    assert ci[-1] == pytest_cmd
    assert any("pip install" in line and "-e '.[test]'" in line for line in ci)
    assert any("python3 -m venv .venv" in line for line in ci)


def test_demo_needs_no_extra_beyond_the_runtime_dependencies() -> None:
    """`pip install -e .` must bring what the demo needs without redis-server (fakeredis)."""
    import tomllib

    deps = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["dependencies"]
    assert any(d.startswith("fakeredis") for d in deps)
