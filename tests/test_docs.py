"""The README keeps exactly two set-up commands, and CI runs the README's test command verbatim."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def setup_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    section = text.split("## Set-up", 1)[1].split("\n## ", 1)[0]
    return [line.strip() for line in section.splitlines() if re.match(r"^    \S", line)]


def test_readme_has_exactly_two_setup_commands():
    cmds = setup_commands()
    assert len(cmds) == 2, cmds
    assert "xo-fit demo" in cmds[0]
    assert "pytest" in cmds[1]


def test_ci_runs_the_readme_test_command():
    ci = (ROOT / ".ci" / "run").read_text()
    assert setup_commands()[1] in ci


def test_every_top_level_entry_is_expected():
    expected = {"README.md", "DEVELOPERS.md", "pyproject.toml", "xo_fit", "targets", "tests", "benchmarks", ".ci",
                ".git", ".gitignore"}
    ignorable = {".venv", ".pytest_cache", ".hypothesis", "demo-out", "xo_fit.egg-info", "build"}
    present = {p.name for p in ROOT.iterdir()} - ignorable
    assert present <= expected, present - expected
