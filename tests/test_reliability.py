"""Reliability: no hang, no lost work, no traceback, whatever the input, the disk or the signal (issue 30).

Each test names the defect it holds fixed. Outcomes are the command line's contract (README: exit 0 done, 2 bad
input with one line naming the file and key, 1 a failure such as a full disk, 130 interrupted with the best
design so far kept) [CP]; sizes and memory are measured against the limits the README states [MEM].
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import signal
import stat
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import xo_fit
from conftest import ladder_job
from test_fuzz import DATA, LINES

ROOT = Path(__file__).resolve().parents[1]


def _job(tmp_path: Path, replace: dict | None = None, add: tuple = (), files: dict | None = None) -> Path:
    """The fuzz suite's two-way job with measured data (tests/test_fuzz.py), edited: lines replaced, lines added."""
    lines = list(LINES)
    for old, new in (replace or {}).items():
        lines[lines.index(old)] = new
    for name, content in {**DATA, **(files or {})}.items():
        (tmp_path / name).write_text(content)
    path = tmp_path / "job.toml"
    path.write_text("\n".join(lines + list(add)) + "\n")
    return path


def _one_line(err: str, also: str = "") -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err + also
    return lines[0]


def _run(args: list, timeout: float = 120, **kw) -> subprocess.CompletedProcess:
    """The command line in a fresh process (for hangs and signals), with this checkout first on the path."""
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, "-m", "xo_fit", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env=env, **kw)


# ----------------------------------------------------------------------------- hangs


@pytest.mark.parametrize("which", ["w-r.txt", "t-z.txt", "curve", "inventory", "job", "result"])
def test_a_fifo_is_refused_before_it_is_opened(tmp_path, which):
    """Opening a FIFO for reading blocks until a writer comes: check, simulate, snap and report hung forever on
    one named as a measurement, a target curve, an inventory, a job or a result. Now: one line, exit 2, at once."""
    job = _job(tmp_path, replace={'curve = "flat"': 'curve = "target.txt"'} if which == "curve" else None,
               files={"target.txt": "10 0\n40000 0\n"})
    fifo = {"curve": tmp_path / "target.txt", "inventory": tmp_path / "drawer.csv", "job": tmp_path / "j.toml",
            "result": tmp_path / "r.json"}.get(which, tmp_path / which)
    fifo.unlink(missing_ok=True)
    os.mkfifo(fifo)
    args = {"inventory": ["snap", job, "--inventory", fifo, "--out", tmp_path / "o", "--no-plots"],
            "job": ["check", fifo], "result": ["report", fifo, "--out", tmp_path / "o"]}.get(which, ["check", job])
    proc = _run(args, timeout=60)
    assert proc.returncode == 2, proc.stderr
    assert "not a regular file" in _one_line(proc.stderr) and fifo.name in proc.stderr
    assert stat.S_ISFIFO(os.stat(fifo).st_mode)


def _chain(n: int) -> str:
    """A chain of n resistors (n nodes) in front of a resistive driver."""
    lines = ['name = "chain"', "[grid]", "points = 100", "[driver.w]", "response = 88", "impedance = 8",
             "[target]", "band = [100, 10000]", "[target.way.w]", 'type = "fullrange"']
    prev = "in"
    for i in range(n):
        lines += ["[[part]]", f'name = "R{i}"', 'type = "R"', f'nodes = ["{prev}", "n{i}"]', "value = 0.01"]
        prev = f"n{i}"
    lines += ["[[part]]", 'name = "W"', 'type = "driver"', 'driver = "w"', f'nodes = ["{prev}", "0"]']
    return "\n".join(lines) + "\n"


def test_a_400_node_chain_simulates_in_seconds(write_job):
    """The negligible-part check rebuilt the job and solved it densely once per removal: a 400-node chain took
    over 120 s to simulate. Above IDLE_MAX_PARTS parts it is skipped, and a finding says so [MEM]."""
    from xo_fit import api
    from xo_fit.stages.removal import IDLE_MAX_NODES, IDLE_MAX_PARTS

    t0 = time.perf_counter()
    d = api.simulate(api.load_job(write_job(_chain(400))))
    findings = d.findings
    assert time.perf_counter() - t0 < 30
    note = [f for f in findings if f["kind"] == "negligible"]
    assert len(note) == 1 and note[0]["part"] is None and "not checked" in note[0]["text"]
    assert f"{IDLE_MAX_PARTS} parts" in note[0]["text"] and f"{IDLE_MAX_NODES} nodes" in note[0]["text"]
    # within the limits the check still runs: every resistor of a short chain does little
    small = api.simulate(api.load_job(write_job(_chain(4), name="small.toml"))).findings
    assert sorted(f["part"] for f in small if f["kind"] == "negligible") == ["R0", "R1", "R2", "R3"]


def test_a_network_above_the_part_limit_is_refused_up_front(write_job, cli):
    """3,000 parallel parts made fit crash with RecursionError compiling its kernel; the job is refused on reading."""
    from xo_fit.job.model import MAX_PARTS

    lines = ["[driver.w]", "response = 88", "impedance = 8"]
    for i in range(3000):
        lines += ["[[part]]", f'name = "R{i}"', 'type = "R"', 'nodes = ["in", "a"]', "value = 100"]
    lines += ["[[part]]", 'name = "W"', 'type = "driver"', 'driver = "w"', 'nodes = ["a", "0"]']
    code, _, err = cli("check", write_job("\n".join(lines) + "\n"))
    assert code == 2 and f"at most {MAX_PARTS} [[part]] tables" in _one_line(err) and "job.toml" in err


# ----------------------------------------------------------------------------- lost work


_SIGNAL_SCRIPT = '''
import os, signal, sys
import xo_fit.model.fused as fused
calls = {{}}  # by process: a forked worker counts its own calls
original = fused.FusedCost.__call__
MAIN = os.getpid()  # the command's process (a worker is forked or spawned from it, or from another worker)

def count():
    if {worker_only} and os.getpid() == MAIN:
        return  # the signal comes from a worker process
    calls[os.getpid()] = calls.get(os.getpid(), 0) + 1
    if calls[os.getpid()] == {at}:
        try:  # the first process there sends the signal, once (a user's Ctrl-C comes once)
            os.close(os.open("signalled", os.O_CREAT | os.O_EXCL | os.O_WRONLY))
        except FileExistsError:
            return
        {send}

def counting(self, values):
    count()
    return original(self, values)

fused.FusedCost.__call__ = counting
import xo_fit.model.cost as cost
original_sim = cost.CostModel.evaluate_simulation

def counting_sim(self, sim, values):
    count()
    return original_sim(self, sim, values)

cost.CostModel.evaluate_simulation = counting_sim
from xo_fit.cli.app import run
sys.argv = ["xo-fit", *{args!r}]
run()
'''

_SENDS = {
    "sigterm": "os.kill(os.getpid(), signal.SIGTERM)",
    "ctrl-c": "os.kill(os.getpid(), signal.SIGINT)",
    # in a worker: the parent alone is told to stop (kill -TERM PID), or the whole process group gets Ctrl-C
    "sigterm-parent": "os.kill(MAIN, signal.SIGTERM)",
    "ctrl-c-group": "os.killpg(os.getpgid(0), signal.SIGINT)",
}


def _interrupted(tmp_path: Path, args: list, send: str, at: int) -> subprocess.CompletedProcess:
    script = _SIGNAL_SCRIPT.format(at=at, send=_SENDS[send], args=[str(a) for a in args],
                                   worker_only=send in ("sigterm-parent", "ctrl-c-group"))
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300, env=env,
                          cwd=tmp_path, start_new_session=True)


@pytest.mark.parametrize("send, workers", [("sigterm", 1), ("ctrl-c", 1), ("sigterm-parent", 2),
                                           ("ctrl-c-group", 2)])
def test_an_interrupted_fit_keeps_the_best_design_so_far(tmp_path, write_job, send, workers):
    """README: "A time limit or Ctrl-C keeps the best design so far". Ctrl-C of `fit --workers N` exited 130 with
    nothing written, and SIGTERM killed any fit outright. Now: result.json (marked interrupted), one line, 130."""
    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    job = write_job(text)
    out = tmp_path / "o"
    proc = _interrupted(tmp_path, ["fit", job, "--out", out, "--budget", "10000000", "--workers", workers,
                                   "--no-plots"], send, at=8)
    assert proc.returncode == 130, proc.stderr + proc.stdout
    assert "interrupted; the best design so far is in" in _one_line(proc.stderr, proc.stdout)
    r = json.loads((out / "result.json").read_text())
    assert r["search"]["complete"] is False and r["search"]["stopped_by"] == "interrupted"
    assert 0 < r["search"]["evaluations"] < 10_000_000 and r["cost"] is not None
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no temporary file left


@pytest.mark.parametrize("send, workers", [("sigterm", 1), ("sigterm-parent", 2)])
@pytest.mark.parametrize("start", ["fit", "from"])
def test_an_interrupted_prune_keeps_its_steps_so_far(tmp_path, write_job, send, workers, start):
    """Ctrl-C of prune was swallowed by the refit's search (the prune went on), and SIGTERM killed it with nothing
    written. Now the steps taken are kept: result.json, prune.csv, job.toml, one line, exit 130. [CP: README,
    docs/outputs.md: interrupted: true, the steps taken so far kept]

    Without --from the job is fitted first, and the signal comes during that fit (its best design is step 0, the
    fit marked incomplete); with --from a fit's result it comes during the trial removals (once the fit came first,
    the signal of the old test never reached the trials any more)."""
    text, _ = ladder_job("LR4", start=1.3, spread=3.0)
    job = write_job(text)
    out = tmp_path / "o"
    args = ["prune", job, "--out", out, "--budget", "400", "--workers", workers, "--no-plots"]
    if start == "from":
        xo_fit.fit(xo_fit.load_job(job)).save(tmp_path / "fit", plots=False)
        args += ["--from", tmp_path / "fit" / "result.json"]
    # from a fit, step 0's refit takes about 20 batches of evaluations and a step's trials side by side about 40:
    # without workers the signal comes in step 2's trials (after step 1 was taken); with workers from a worker,
    # which runs trials alone (without --from, both come during the fit)
    proc = _interrupted(tmp_path, args, send, at=100 if workers == 1 else 3)
    assert proc.returncode == 130, proc.stderr
    assert re.search(r"interrupted after step \d+; the best design so far is in", _one_line(proc.stderr))
    r = json.loads((out / "result.json").read_text())
    assert r["prune"]["interrupted"] is True and r["stage"] == "prune"
    rows = (out / "prune.csv").read_text().splitlines()
    assert rows[0].startswith("step,parts") and len(rows) - 1 == len(r["prune"]["steps"]) < 7
    if start == "fit":
        assert r["prune"]["fit"]["complete"] is False and len(r["prune"]["steps"]) == 1
    else:
        assert "fit" not in r["prune"] and len(r["prune"]["steps"]) >= (2 if workers == 1 else 1)


def _disk_full(monkeypatch):
    """Writes fail as on a full disk: half the text, then OSError ENOSPC."""
    import pathlib

    def write_text(self, data, *a, **k):
        with open(self, "w") as fh:
            fh.write(data[: len(data) // 2])
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def write_bytes(self, data):
        with open(self, "wb") as fh:
            fh.write(data[: len(data) // 2])
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(pathlib.Path, "write_text", write_text)
    monkeypatch.setattr(pathlib.Path, "write_bytes", write_bytes)


@pytest.mark.parametrize("command", ["simulate", "fit", "export", "report"])
def test_a_full_disk_is_one_line_exit_1_and_leaves_no_temporary_file(tmp_path, cli, monkeypatch, command):
    """A full disk gave OSError tracebacks in fit, simulate, export and report."""
    text, _ = ladder_job("LR2", start=1.0, spread=2.0)
    job = tmp_path / "job.toml"
    job.write_text(text)
    done = tmp_path / "done"
    assert cli("simulate", job, "--out", done, "--no-plots")[0] == 0
    out = tmp_path / "out"
    out.mkdir()
    (out / "result.json").write_text("the previous result\n")
    _disk_full(monkeypatch)
    args = {"simulate": ["simulate", job, "--out", out, "--no-plots"],
            "fit": ["fit", job, "--out", out, "--budget", "300", "--no-plots"],
            "export": ["export", done, "--spice", out / "result.json"],
            "report": ["report", done, "--out", out]}[command]
    code, _, err = cli(*args)
    assert code == 1, err
    assert "the disk is full" in _one_line(err) and str(out) in err
    assert sorted(p.name for p in out.iterdir()) == ["result.json"]  # no temporary file; nothing else written
    assert (out / "result.json").read_text() == "the previous result\n"  # the finished file kept


def test_outputs_onto_a_file_a_folder_or_a_fifo_are_one_line(tmp_path, cli):
    """`--out` onto a file and `--spice` onto a folder gave tracebacks; onto a FIFO (or a device, as root) the
    atomic rename replaced the node with a regular file. Now each is one line, and the node stays."""
    text, _ = ladder_job("LR2")
    job = tmp_path / "job.toml"
    job.write_text(text)
    assert cli("simulate", job, "--out", tmp_path / "r", "--no-plots")[0] == 0
    (tmp_path / "afile").write_text("x")
    (tmp_path / "adir").mkdir()
    os.mkfifo(tmp_path / "fifo")
    cases = [(["simulate", job, "--out", tmp_path / "afile", "--no-plots"], "is a file, not a folder"),
             (["report", tmp_path / "r", "--out", tmp_path / "afile" / "sub"], "is a file, not a folder"),
             (["export", tmp_path / "r", "--spice", tmp_path / "adir"], "a folder stands there"),
             (["export", tmp_path / "r", "--spice", tmp_path / "afile" / "x.cir"], "is a file, not a folder"),
             (["export", tmp_path / "r", "--spice", tmp_path / "fifo"], "a device, pipe or socket stands there")]
    for args, message in cases:
        code, _, err = cli(*args)
        assert code == 1 and message in _one_line(err), (args, err)
    assert stat.S_ISFIFO(os.stat(tmp_path / "fifo").st_mode) and (tmp_path / "afile").read_text() == "x"
    assert os.listdir(tmp_path / "adir") == []


def test_an_atomic_write_never_replaces_a_device_node(tmp_path):
    """Where a device or FIFO stands, the rename is refused (here a FIFO stands in for a device node)."""
    from xo_fit.errors import WriteError
    from xo_fit.io.results import write_text

    os.mkfifo(tmp_path / "node")
    with pytest.raises(WriteError, match="never replaces such a node"):
        write_text(tmp_path / "node", "deck")
    assert stat.S_ISFIFO(os.stat(tmp_path / "node").st_mode) and os.listdir(tmp_path) == ["node"]


# ----------------------------------------------------------------------------- hand-edited results


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    """A simulate and a spread result of the fuzz job, made once: {"job", "simulate", "spread"}."""
    from xo_fit.cli.app import main

    folder = tmp_path_factory.mktemp("results")
    job = _job(folder)
    for stage, extra in (("simulate", []), ("spread", ["--samples", "20"])):
        assert main([stage, str(job), "--out", str(folder / stage), "--no-plots", *extra]) == 0
    return {"job": job, "simulate": folder / "simulate", "spread": folder / "spread"}


_PRUNE = {"steps": [{"step": 0, "parts": 6, "removed": "", "how": "", "cost": 1.0, "rms_error_db": 0.5,
                     "max_error_db": 1.0, "phase_mismatch_deg": 4.0, "impedance_min_ohm": 5.1},
                    {"step": 1, "parts": 5, "removed": "R1", "how": "short", "cost": 1.05, "rms_error_db": 0.52,
                     "max_error_db": 1.1, "phase_mismatch_deg": 4.5, "impedance_min_ohm": 5.0}], "chosen_step": 1,
          "max_increase": 0.1}


def _set(doc: dict, path: str, value) -> None:
    keys = [int(k) if k.isdigit() else k for k in re.split(r"[.\[\]]+", path.strip("]")) if k]
    for k in keys[:-1]:
        doc = doc[k]
    doc[keys[-1]] = value


def _edit(src: Path, dst: Path, edits: dict, raw: tuple | None = None, csv_lines: int | None = None) -> Path:
    shutil.copytree(src, dst)
    doc = json.loads((dst / "result.json").read_text())
    for path, value in edits.items():
        _set(doc, path, json.loads(json.dumps(value)))  # a copy: the cases share _PRUNE
    text = json.dumps(doc)
    if raw:
        text = text.replace(*raw, 1)
    (dst / "result.json").write_text(text)
    if csv_lines is not None:
        rows = (dst / "spread.csv").read_text().splitlines()
        (dst / "spread.csv").write_text("\n".join(rows[:csv_lines]) + "\n")
    return dst


HAND_EDITS = [
    # (name, stage, edits, raw text replacement, spread.csv lines kept, the key the message names)
    ("infinity", "simulate", {}, ('"cost": ', '"cost": Infinity, "was": '), None, "cost: not a finite number"),
    ("1e999", "simulate", {}, ('"value": ', '"value": 1e999, "was": '), None, r"parts\.\w+\.value: not a finite"),
    ("400 digits", "simulate", {}, ('"value": ', '"value": ' + "9" * 400 + ', "was": '), None,
     r"parts\.\w+\.value: not a finite"),
    ("prune a text", "simulate", {"prune": "all of it"}, None, None, "prune: expected a table"),
    ("prune steps a text", "simulate", {"prune": {**_PRUNE, "steps": "x"}}, None, None, r"prune\.steps: expected"),
    ("prune step a text", "simulate", {"prune": _PRUNE, "prune.steps[1].step": "one"}, None, None,
     r"prune\.steps\[1\]\.step: expected the whole number 1"),
    ("prune script", "simulate", {"prune": _PRUNE, "prune.steps[1].removed": "<script>alert(1)</script>"}, None,
     None, r"prune\.steps\[1\]\.removed: expected the name of the part removed"),
    ("prune cost", "simulate", {"prune": _PRUNE, "prune.steps[0].cost": "low"}, None, None,
     r"prune\.steps\[0\]\.cost: expected a number or null"),
    ("prune chosen", "simulate", {"prune": _PRUNE, "prune.chosen_step": 7}, None, None,
     r"prune\.chosen_step: expected a step number from 0 to 1"),
    ("spread a text", "spread", {"spread": "wide"}, None, None, "spread: expected a table"),
    ("spread yield", "spread", {"spread.yield": 3}, None, None, r"spread\.yield: expected a table"),
    ("spread sensitivity", "spread", {"spread.sensitivity": [{"part": 5}]}, None, None,
     r"spread\.sensitivity\[0\]: expected"),
    ("combination a text", "simulate", {"parts.L1.combination": "two"}, None, None, r"parts\.L1\.combination"),
    ("combination parts", "simulate", {"parts.L1.combination": {"connection": "series", "parts": [{"text": 3}]}},
     None, None, r"parts\.L1\.combination: expected"),
    ("series a table", "simulate", {"parts.L1.series": {"E": 12}}, None, None, r"parts\.L1\.series: expected a text"),
    ("source a text", "simulate", {"source": "here"}, None, None, "source: expected a table"),
    ("source folder a number", "simulate", {"source.job_folder": 3}, None, None, r"source\.job_folder: expected"),
    ("source document a list", "simulate", {"source.document": [1]}, None, None, r"source\.document: expected"),
    ("stage a list", "simulate", {"stage": ["fit"]}, None, None, "stage: expected a text"),
    ("search a text", "simulate", {"search": "done"}, None, None, "search: expected a table"),
    ("short spread.csv", "spread", {}, None, 5, r"spread\.csv: spread\.csv holds 4 rows; the result's grid has"),
    ("spread.csv header only", "spread", {}, None, 1, r"spread\.csv: spread\.csv holds no rows"),
]


@pytest.mark.parametrize("name, stage, edits, raw, csv_lines, message", HAND_EDITS, ids=[h[0] for h in HAND_EDITS])
def test_hand_edited_results_are_one_line_naming_the_file_and_key(results, tmp_path, cli, name, stage, edits, raw,
                                                                  csv_lines, message):
    """report and export (and --from) ended in tracebacks on 17 of these (Infinity, 1e999, a 400-digit integer,
    malformed prune, spread, combination and source sections, a short spread.csv) and put a prune step's text
    into report.html unescaped (a stored script). Each is now one line naming the file and the key; nothing is
    written."""
    edited = _edit(results[stage], tmp_path / "r", edits, raw, csv_lines)
    commands = [["report", edited, "--out", tmp_path / "report"], ["export", edited, "--spice", tmp_path / "x.cir"]]
    if csv_lines is None:
        commands.append(["simulate", results["job"], "--from", edited, "--out", tmp_path / "s", "--no-plots"])
    for args in commands:
        code, _, err = cli(*args)
        assert code == 2, (args, err)
        line = _one_line(err)
        assert str(edited) in line and re.search(message, line), (args, line)
    assert not (tmp_path / "report").exists() and not (tmp_path / "x.cir").exists() and not (tmp_path / "s").exists()


def test_a_well_formed_prune_section_is_reported_with_every_cell_escaped(results, tmp_path, cli):
    """The prune table of report.html escapes what comes from the result file."""
    edited = _edit(results["simulate"], tmp_path / "r", {"prune": _PRUNE, "parts.L1.series": "<b>E12</b>"})
    code, _, err = cli("report", edited, "--out", tmp_path / "report")
    assert code == 0, err
    page = (tmp_path / "report" / "report.html").read_text()
    assert "<b>E12</b>" not in page and "&lt;b&gt;E12&lt;/b&gt;" in page and "<h2>Pruning</h2>" in page


# ----------------------------------------------------------------------------- refused at check, with the key


CHECKS = [
    # (lines replaced, lines added, what the one line must say)
    ({"impedance_min = 3.2": "impedance_min = 1e300"}, (),
     r"job.toml:\d+: \[cost\] impedance_min: 1e300 Ω is out of range: expected 0 Ω to 10 kΩ"),
    ({"resistance = 0.05": "resistance = 1e300"}, (), r"\[source\] resistance: .* is out of range"),
    ({'offset = "5mm"': "offset = -1e300"}, (), r"\[driver.tweeter\] offset: .* is out of range: expected -10 m"),
    ({'rating = "10W"': "rating = 1e300"}, (), r"part R1 rating: .* is out of range"),
    ({"power = 50": "power = 1e300"}, (), r"\[stress\] power: .* is out of range"),
    ({"fc = 2200": "fc = 1e300"}, (), r"\[target.way.woofer\] fc: .* is out of range"),
    ({'dcr = "18awg"': "dcr = 1e300"}, (), r"part L1 dcr: .* is out of range"),
    ({'tolerance = "5%"': 'tolerance = "100%"'}, (), r"part C2 tolerance: 100 % is too much: .* below 100 %"),
    ({"samples = 50": 'tolerance = { L = "150%" }'}, (), r"\[spread\] tolerance: L: 150 % is too much"),
    ({'dcr = "18awg"': 'dcr = "99awg"'}, (), r"job.toml:\d+: part L1 dcr: '99awg': wire gauge must be between 0 and 40"),
    ({}, ("[snap]", 'series = "E7"'), r"\[snap\] series: L: unknown series 'E7'"),
    ({'name = "L1"': 'name = "L1\\n"'}, (), r"\[\[part\]\] #1 name: 'L1\\n' is not a valid part name"),
    ({'nodes = ["in", "w1"]': 'nodes = ["in", "w1\\u001b[31m"]'}, (), r"'w1\\x1b\[31m' is not a valid node name"),
    ({'name = "fuzz"': 'name = "fuzz\\u0085"'}, (), r"cannot name files and folders"),
]


@pytest.mark.parametrize("replace, add, message", CHECKS)
def test_absurd_values_are_refused_at_check_with_their_key(tmp_path, cli, replace, add, message):
    """impedance_min = 1e300 passed check and put a bare `inf` into the generated kernel; tolerances of 100 % and
    more passed check, then the spread failed; '99awg' named no file, part or key; a trailing line break passed
    the name pattern ("$" matches before it). Now each is refused by check in one line naming the key."""
    code, _, err = cli("check", _job(tmp_path, replace, add))
    assert code == 2, err
    line = _one_line(err)
    assert re.search(message, line), line
    assert "\x1b" not in err  # control characters reach the terminal escaped


def test_an_unknown_nevergrad_optimizer_is_refused_at_check(tmp_path, cli):
    """It passed check and failed the fit naming neither file nor key."""
    pytest.importorskip("nevergrad")
    code, _, err = cli("check", _job(tmp_path, add=("[search]", 'optimizer = "ng-TwoPointDE"')))
    assert code == 2 and re.search(r"job.toml:\d+: \[search\] optimizer: unknown nevergrad optimizer 'TwoPointDE' "
                                   r"\(did you mean 'ng-TwoPointsDE'\?\)", _one_line(err)), err
    code, _, err = cli("fit", _job(tmp_path), "--out", tmp_path / "o", "--optimizer", "ng-Nope", "--no-plots")
    assert code == 2 and "--optimizer: unknown nevergrad optimizer 'Nope'" in _one_line(err), err


def test_the_optimizer_names_check_knows_are_the_engines():
    """[CP] the names the job check accepts are the engines the search runs (and "auto")."""
    from xo_fit.job.tables import OPTIMIZERS
    from xo_fit.search.engines import ENGINES

    assert set(OPTIMIZERS) == {"auto", *ENGINES}


@pytest.mark.parametrize("args, message", [
    (["--series", "E7"], "--series: unknown series 'E7'"),
    (["--series", "L=E12,C=E7"], "--series: unknown series 'E7'"),
    (["--top-up", "E7", "--inventory", "drawer.csv"], "--top-up: unknown series 'E7'"),
])
def test_an_unknown_series_names_its_option(tmp_path, cli, args, message):
    (tmp_path / "drawer.csv").write_text("L,1mH,4\n")
    args = [str(tmp_path / a) if a == "drawer.csv" else a for a in args]
    code, _, err = cli("snap", _job(tmp_path), "--out", tmp_path / "o", "--no-plots", *args)
    assert code == 2 and message in _one_line(err), err


def test_a_drawer_short_of_parts_is_named(tmp_path, cli):
    """"the inventory does not hold enough parts" named no file."""
    (tmp_path / "drawer.csv").write_text("kind,value,count\nL,1mH,1\n")
    code, _, err = cli("snap", _job(tmp_path), "--inventory", tmp_path / "drawer.csv", "--out", tmp_path / "o",
                       "--no-plots")
    assert code == 2, err
    assert re.search(r"drawer\.csv: the inventory does not hold enough parts .*coils: 2 needed, 1 held", _one_line(err))


def test_samples_beyond_their_range_are_refused(tmp_path, cli):
    """`--samples 2^40` was taken (then the draws alone wanted 140 TB)."""
    code, _, err = cli("spread", _job(tmp_path), "--out", tmp_path / "o", "--samples", str(2**40))
    assert code == 2 and "100000000" in err and not (tmp_path / "o").exists()


# ----------------------------------------------------------------------------- memory budgets


def test_the_spread_histogram_stays_within_its_budget_and_its_percentiles_within_half_a_bin(monkeypatch):
    """[MEM] The histogram was (curves, points, 6001) int64 whatever the sample count: 14 GB for three curves at
    the allowed 100,000 points. Now at most HIST_BYTES; wider bins keep percentiles exact to half a bin [DER: the
    percentiles of the draws themselves, numpy's]."""
    import xo_fit.stages.tolerance as tol

    assert tol._Hist(3, 100_000).counts.nbytes <= tol.HIST_BYTES == 256 * 2**20
    assert tol._Hist(4, 320).nb == 6001  # a usual job keeps its 0.01 dB bins (same numbers as before)
    monkeypatch.setattr(tol, "HIST_BYTES", 4 * 2 * 5 * 223)
    h = tol._Hist(2, 5)
    assert h.nb == 223 and h.step == pytest.approx(60 / 222)
    dev = np.random.default_rng(3).normal(0.0, 2.0, (40_000, 2, 5))
    h.add(dev)
    for q in (5, 50, 95):
        np.testing.assert_allclose(h.percentile(q), np.percentile(dev, q, axis=0), atol=h.step / 2)


def test_the_tolerance_draws_are_refused_above_their_budget(tmp_path, monkeypatch):
    """[MEM] samples x parts x 8 bytes of draws were allocated whatever their size (10^8 draws of 16 parts:
    12.8 GB); above DRAWS_BYTES the spread is refused up front, naming the key."""
    import xo_fit.stages.tolerance as tol
    from xo_fit import api
    from xo_fit.errors import JobError

    monkeypatch.setattr(tol, "DRAWS_BYTES", 1000 * 5 * 8)
    job = api.load_job(_job(tmp_path))
    with pytest.raises(JobError, match=r"\[spread\] samples \(or --samples\): 1001 tolerance draws of 5 parts need"):
        api.spread(job, samples=1001)
    assert api.spread(job, samples=1000).result.samples == 1000


def test_minimum_phase_on_a_large_grid_in_bounded_memory():
    """[MEM] The Bode kernel was (grid points x nodes) whole, with five temporaries as large: over 5 GB at 100,000
    points. On a grid finer than its nodes the phase is now interpolated from 4 points per node interval: memory
    does not grow with the grid, and a BW2 high-pass keeps its analytic phase [DER: scipy.signal, as in
    tests/test_measure.py] within 0.5 deg."""
    import tracemalloc

    from scipy import signal as sig

    from xo_fit.physics.minimum_phase import minimum_phase

    f = np.geomspace(20, 20000, 200)
    b, a = sig.butter(2, 2 * np.pi * 1000.0, "high", analog=True)
    h = sig.freqs(b, a, 2 * np.pi * f)[1]
    grid = np.geomspace(20, 20000, 40_000)
    tracemalloc.start()
    ph = np.rad2deg(minimum_phase(f, 20 * np.log10(np.abs(h)), grid))
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 400 * 2**20, peak / 2**20
    want = np.rad2deg(np.unwrap(np.angle(sig.freqs(b, a, 2 * np.pi * grid)[1])))
    band = (grid >= 100) & (grid <= 10000)
    np.testing.assert_allclose(ph[band], want[band], atol=0.5)


def test_off_axis_data_beyond_its_budget_is_refused_before_any_file_is_read(write_job, cli):
    """[MEM] positions x points had no cap; 539 positions of one driver at 100,000 points (54 M values) are refused
    up front, before the (missing) files are looked for."""
    from xo_fit.job.model import MAX_ANGLE_VALUES

    h = ", ".join(str(a) for a in range(1, 181))
    v = ", ".join(str(a) for a in range(-179, 180) if a)
    text = textwrap.dedent(f'''
        [grid]
        points = 100000
        [driver.w]
        response = "w.txt"
        impedance = 8
        [driver.w.angles]
        horizontal = "h{{angle}}.txt"
        vertical = "v{{angle}}.txt"
        horizontal_angles = [{h}]
        vertical_angles = [{v}]
        [[part]]
        name = "W"
        type = "driver"
        driver = "w"
        nodes = ["in", "0"]
        ''')
    code, _, err = cli("check", write_job(text))
    assert code == 2, err
    assert f"539 positions x 1 drivers x 100000 points is more off-axis data than xo_fit holds (at most " \
           f"{MAX_ANGLE_VALUES:,})" in _one_line(err)


# ----------------------------------------------------------------------------- names and texts


def test_spice_nodes_never_take_ngspice_ground_aliases(tmp_path, cli):
    """A job node named gnd (or GND) stayed gnd in the deck, which ngspice takes as ground: the deck silently
    simulated another circuit. Now it is renamed, and ngspice gives xo_fit's driver voltages [SRC: ngspice]."""
    ngspice = shutil.which("ngspice")
    if ngspice is None:
        if os.environ.get("XO_FIT_REQUIRE_NGSPICE") == "1":
            raise RuntimeError("ngspice is required (XO_FIT_REQUIRE_NGSPICE=1)")
        pytest.skip("ngspice not installed")
    from xo_fit import api

    text, _ = ladder_job("LR2")
    text = text.replace('"w0"', '"gnd"').replace('"t0"', '"GND"')
    job = tmp_path / "job.toml"
    job.write_text(text)
    assert cli("simulate", job, "--out", tmp_path / "r", "--no-plots")[0] == 0
    assert cli("export", tmp_path / "r", "--spice", tmp_path / "x.cir")[0] == 0
    deck = (tmp_path / "x.cir").read_text()
    statements = [line.split() for line in deck.splitlines() if line and line[0] not in "*.+"]
    assert not [s for s in statements if {"gnd"} & {w.lower() for w in s[1:3]}], deck
    run = subprocess.run([ngspice, "-b", "x.cir"], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stdout + run.stderr
    data = np.loadtxt(tmp_path / re.search(r"^wrdata (\S+)", deck, re.M)[1], skiprows=1)
    s = api.load_result(tmp_path / "r").system
    mine = s.network.solve(s.values()).voltages[0]
    spice = data[:, 1::2] + 1j * data[:, 2::2]
    np.testing.assert_allclose(spice[:, 0], mine[0], rtol=1e-6)
    np.testing.assert_allclose(spice[:, 1], mine[1], rtol=1e-6)


def test_control_characters_in_user_text_reach_the_terminal_escaped(tmp_path, cli):
    """An ESC sequence in a name or a path went to the terminal as it was (recolouring it, moving the cursor)."""
    code, _, err = cli("snap", _job(tmp_path), "--inventory", tmp_path / "x\x1b[2J\x1b[31m.csv", "--out",
                       tmp_path / "o")
    assert code == 2 and "\x1b" not in err and r"x\x1b[2J\x1b[31m.csv" in _one_line(err), err
    from xo_fit.errors import printable

    assert printable("a\x1b[31mb\r\x00\x9b\u2028\tc\n") == "a\\x1b[31mb\\r\\x00\\x9b\\u2028\tc\n"


# ----------------------------------------------------------------------------- property: hand-edited results

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

HOSTILE = [None, True, 0, -1, 1e308, -1e308, 5e-324, "", " ", "<script>alert(1)</script>", "$\\frac{$", "x" * 5000,
           "\x1b[31m", "a\nb", "\u2028", [], [1, "2"], {}, {"a": {"b": []}}, [[[[[[]]]]]], "NaN", "Infinity", 1.5,
           "fit", "spread", "prune", "../../etc/passwd", "/dev/zero", "\x00"]
RAW = ["Infinity", "-Infinity", "NaN", "1e999", "9" * 400, "-" + "9" * 40, "1e-400"]


def _paths(doc, prefix=(), depth=0):
    """Every (path) to a value in a result, the parts and sections first; lists and tables to depth 6."""
    out = [prefix] if prefix else []
    if depth >= 6:
        return out
    items = doc.items() if isinstance(doc, dict) else enumerate(doc) if isinstance(doc, list) else ()
    for k, v in list(items)[:40]:
        out += _paths(v, prefix + (k,), depth + 1)
    return out


def _apply(doc, path, op, value):
    for k in path[:-1]:
        doc = doc[k]
    if op == "delete":
        del doc[path[-1]]
    elif op == "rename" and isinstance(doc, dict):
        doc[f"{path[-1]}_x"] = doc.pop(path[-1])
    else:
        doc[path[-1]] = value


@settings(max_examples=int(os.environ.get("XO_FIT_FUZZ_EXAMPLES", "12")), deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_edit_of_a_result_gives_exit_0_or_one_line(results, tmp_path_factory, data):
    """Property: whatever one edits in a result.json (a value replaced by a hostile one, a key deleted or renamed,
    a number made non-finite in the text), report, export and --from end with exit 0, or exit 2 and one line
    naming the file; never a traceback, and report.html never holds an unescaped script."""
    from xo_fit.cli.app import main

    stage = data.draw(st.sampled_from(["simulate", "spread"]))
    src = results[stage]
    doc = json.loads((src / "result.json").read_text())
    paths = _paths(doc)
    edits = data.draw(st.lists(st.tuples(st.sampled_from(range(len(paths))), st.sampled_from(["set", "delete", "rename"]),
                                         st.sampled_from(HOSTILE)), min_size=1, max_size=3))
    for i, op, value in edits:
        try:
            _apply(doc, paths[i], op, value)
        except (KeyError, IndexError, TypeError):
            pass  # an earlier edit took the path away
    text = json.dumps(doc)
    if data.draw(st.booleans()):
        spots = [m.end() for m in re.finditer(r'": ', text)]
        if spots:
            at = data.draw(st.sampled_from(spots))
            end = re.match(r"-?[\d.eE+-]+", text[at:])
            if end:
                text = text[:at] + data.draw(st.sampled_from(RAW)) + text[at + end.end():]
    tmp = tmp_path_factory.mktemp("edit")
    shutil.copytree(src, tmp / "r")
    (tmp / "r" / "result.json").write_text(text)
    import contextlib
    import io

    for args in (["export", tmp / "r", "--spice", tmp / "x.cir"],
                 ["simulate", results["job"], "--from", tmp / "r", "--out", tmp / "s", "--no-plots"],
                 ["report", tmp / "r", "--out", tmp / "report"]):
        err = io.StringIO()
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            code = main([str(a) for a in args])
        assert code in (0, 2), (args, err.getvalue())
        if code == 2:
            assert str(tmp / "r") in _one_line(err.getvalue())
        elif args[0] == "report":
            assert "<script" not in (tmp / "report" / "report.html").read_text()


def test_sigterm_while_a_result_is_written_leaves_no_temporary_file(tmp_path, write_job):
    """SIGTERM killed every command outright: one that came while a file was being written left its temporary
    file (`.result.json.XXXX`) behind. Now it is taken as Ctrl-C: the temporary file goes, one line, exit 130."""
    text, _ = ladder_job("LR2")
    job = write_job(text)
    out = tmp_path / "o"
    script = textwrap.dedent(f'''
        import os, pathlib, signal, sys
        original = pathlib.Path.write_text

        def write_text(self, data, *a, **k):
            original(self, data[: len(data) // 2], *a, **k)
            os.kill(os.getpid(), signal.SIGTERM)
            return original(self, data, *a, **k)

        pathlib.Path.write_text = write_text
        from xo_fit.cli.app import run
        sys.argv = ["xo-fit", "simulate", {str(job)!r}, "--out", {str(out)!r}, "--no-plots"]
        run()
    ''')
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120, env=env)
    assert proc.returncode == 130 and _one_line(proc.stderr) == "xo-fit: interrupted", proc.stderr
    assert list(out.iterdir()) == []


@pytest.mark.slow
def test_the_fuzz_harness_finds_no_traceback_and_no_hang():
    """A short run of tests/fuzz_harness.py (XO_FIT_FUZZ_RUNS runs, 80 by default; the script runs thousands):
    every command ends in exit 0, 1, 2 or 130, none in a traceback or a hang."""
    import fuzz_harness

    stats = fuzz_harness.fuzz(int(os.environ.get("XO_FIT_FUZZ_RUNS", "80")), seed=11, quiet=True)
    assert not stats["tracebacks"] and not stats["hangs"], fuzz_harness.report(stats)


def test_a_top_up_of_none_means_no_top_up(tmp_path, cli):
    """`--top-up none` (continuous values, no series) ended in KeyError: 'none' (found by tests/fuzz_harness.py)."""
    (tmp_path / "drawer.csv").write_text("L,1mH,4\nC,10uF,4\nC,6.8uF,4\nR,2R2,4\n")
    code, _, err = cli("snap", _job(tmp_path), "--inventory", tmp_path / "drawer.csv", "--top-up", "none", "--out",
                       tmp_path / "o", "--no-plots")
    assert code == 0, err
    parts = json.loads((tmp_path / "o" / "result.json").read_text())["parts"]
    assert {e.get("source") for e in parts.values()} <= {"inventory", "fixed", "continuous"}
