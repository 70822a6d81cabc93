"""Every benchmark runs: each script under benchmarks/ at its --smoke size (a few seconds), so that none rots.

The figures they print are not checked here (speed goals live in the benchmarks, never in timed tests); a
benchmark that crashes, or prints nothing, fails.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
BENCHMARKS = sorted((ROOT / "benchmarks").glob("*.py"))


def test_there_are_benchmarks():
    assert {p.stem for p in BENCHMARKS} >= {"batch", "fit", "solver", "startup", "workers"}


@pytest.mark.slow
@pytest.mark.parametrize("script", BENCHMARKS, ids=[p.stem for p in BENCHMARKS])
def test_a_benchmark_runs_at_its_smoke_size(script, tmp_path):
    assert "--smoke" in script.read_text(encoding="utf-8"), f"{script.name} has no --smoke size"
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg", "TMPDIR": str(tmp_path)}
    r = subprocess.run([sys.executable, str(script), "--smoke"], capture_output=True, text=True, timeout=300,
                       cwd=tmp_path, env=env)
    assert r.returncode == 0, f"{script.name}:\n{r.stdout[-2000:]}\n{r.stderr[-3000:]}"
    assert r.stdout.strip(), f"{script.name} printed nothing"
