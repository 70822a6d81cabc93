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
    expected = {"README.md", "DEVELOPERS.md", "pyproject.toml", "xo_fit", "docs", "tests", "benchmarks", ".ci",
                ".git", ".gitignore"}
    ignorable = {".venv", ".pytest_cache", ".hypothesis", ".ruff_cache", ".mypy_cache", "demo-out", "xo_fit.egg-info",
                 "build"}
    present = {p.name for p in ROOT.iterdir()} - ignorable
    assert present <= expected, present - expected


def _tracked_files() -> list[Path]:
    import subprocess

    try:
        out = subprocess.run(["git", "ls-files"], cwd=ROOT, capture_output=True, text=True, check=True).stdout
        return [ROOT / p for p in out.splitlines() if (ROOT / p).is_file()]
    except (OSError, subprocess.CalledProcessError):  # not a git checkout (an unpacked sdist): every file
        return [p for p in ROOT.rglob("*") if p.is_file() and ".venv" not in p.parts and ".git" not in p.parts]


def test_nothing_refers_outside_the_repository():
    """A user who clones or installs xo_fit has only the repository: no file may point at a folder beside it."""
    team = "shared"  # the team's folder beside the checkout (spelt apart so that this test does not find itself)
    pattern = re.compile(rf"\.\./{team}|{team}/design|{team}/hooks")
    bad = []
    for p in _tracked_files():
        try:
            text = p.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue
        bad += [f"{p.relative_to(ROOT)}:{i}" for i, line in enumerate(text.splitlines(), 1) if pattern.search(line)]
    assert not bad, bad


def test_readme_links_the_docs():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    for name in ("job-format.md", "outputs.md", "api.md", "references.md"):
        assert (ROOT / "docs" / name).is_file()
        assert f"docs/{name}" in readme, name


def _doc_sections() -> dict[str, dict[str, str]]:
    """docs/job-format.md: heading -> {key: default column} for every table row."""
    out: dict[str, dict[str, str]] = {}
    current = None
    for line in (ROOT / "docs" / "job-format.md").read_text(encoding="utf-8").splitlines():
        if line.startswith("### "):
            current = out.setdefault(line[4:].strip(), {})
        elif current is not None and line.startswith("| `"):
            cells = [c.strip() for c in line.strip("|").split("|")]
            for key in re.findall(r"`([a-z_][a-z0-9_]*)`", cells[0]):
                current[key] = cells[3]
    return out


def _render(table: str, key: str, value) -> str:
    if value is None:
        return "none"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, (int, float)):
        return f"{value:g}"
    if isinstance(value, dict):
        items = [f'{k} = "{v * 100:g}%"' if key == "tolerance" else f"{k} = {_render(table, key, v)}"
                 for k, v in value.items()]
        return "{ " + ", ".join(items) + " }"
    raise TypeError(value)


def test_job_format_doc_has_every_default():
    """Every key of DEFAULTS is documented in its table of docs/job-format.md, with the same default."""
    from xo_fit.job.model import DEFAULTS

    where = {"grid": "[grid]", "source": "[source]", "acoustics": "[acoustics]", "driver": "[driver.NAME]",
             "thiele_small": "[driver.NAME.impedance]", "angles": "[driver.NAME.angles]",
             "position": "[driver.NAME.position]", "box": "[driver.NAME.box]", "part": "[[part]]",
             "target": "[target]",
             "way": "[target.way.NAME]", "cost": "[cost]", "search": "[search]", "snap": "[snap]",
             "spread": "[spread]", "stress": "[stress]", "splice": "[driver.NAME.response]", "limits": "[limits]"}
    assert set(where) == set(DEFAULTS)
    docs = _doc_sections()
    for table, keys in DEFAULTS.items():
        section = docs[where[table]]
        for key, value in keys.items():
            assert key in section, f"{where[table]} {key} is not documented"
            assert section[key] == _render(table, key, value), (where[table], key, section[key])


def test_job_format_doc_lists_every_key():
    """Every key a table takes (the set "did you mean" chooses from) has its row in docs/job-format.md."""
    from xo_fit.job.model import KEYS

    where = {"grid": "[grid]", "source": "[source]", "acoustics": "[acoustics]", "driver": "[driver.NAME]",
             "thiele_small": "[driver.NAME.impedance]", "angles": "[driver.NAME.angles]",
             "splice": "[driver.NAME.response]", "position": "[driver.NAME.position]", "ts": "[driver.NAME.ts]",
             "box": "[driver.NAME.box]", "part": "[[part]]", "target": "[target]",
             "way": "[target.way.NAME]", "cost": "[cost]", "search": "[search]", "snap": "[snap]",
             "spread": "[spread]", "stress": "[stress]", "baffle": "[baffle]", "limits": "[limits]"}
    docs = _doc_sections()
    for kind, keys in KEYS.items():
        if kind in ("top", "robust"):
            continue
        missing = {k for k in keys if k not in docs[where[kind]]} - ({"way"} if kind == "target" else set())
        assert not missing, (kind, missing)
