"""Batches under faults (issue 30): signals, a full disk, a lost or bogus scheduler, hand-edited store rows and
results, jobs that cannot load, oversized sweeps, names a spreadsheet would run. Each ends in one line on stderr
(never a traceback), and no row of the store is left "running"."""

from __future__ import annotations

import csv
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import ladder_job, need
from test_batch import cli, make_jobs, rows


def long_jobs(folder: Path, n: int) -> None:
    """Jobs that take half a minute each (a robust fit over 32 draws), to be stopped while they run."""
    for p in make_jobs(folder, n, budget=200000):
        p.write_text(p.read_text().replace("[search]\n", "[search]\nrobust = { samples = 32 }\n"))


def statuses(out: Path) -> dict:
    return {k: v[0] for k, v in rows(out).items()}


def wait_for(predicate, timeout: float = 60.0) -> bool:
    deadline = time.time() + timeout
    while time.time() < deadline:
        try:
            if predicate():
                return True
        except (sqlite3.Error, OSError):
            pass
        time.sleep(0.1)
    return False


def one_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


@pytest.mark.parametrize("how", ["SIGTERM", "Ctrl-C"])
def test_a_signal_marks_the_unfinished_rows_interrupted_in_one_line(tmp_path, how):
    """SIGTERM to the batch, or Ctrl-C (SIGINT to the terminal's whole process group): exit 128 + the signal, one
    line, the unfinished stages "interrupted" (not "running"), the workers gone."""
    long_jobs(tmp_path, 3)
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "xo_fit", "batch", str(tmp_path / "*.toml"), "--out", str(out),
                             "--workers", "1", "--stages", "fit,snap", "--no-plots"], start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        assert wait_for(lambda: "running" in statuses(out).values() and _children(proc.pid)), "no batch started"
        kids = _children(proc.pid)
        time.sleep(0.5)
        if how == "SIGTERM":
            proc.send_signal(signal.SIGTERM)
        else:
            os.killpg(proc.pid, signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == (143 if how == "SIGTERM" else 130), err
    assert f"interrupted ({how})" in one_line(err)
    got = statuses(out)
    assert "running" not in got.values() and list(got.values()).count("interrupted") == 6, got
    assert wait_for(lambda: not any(_alive(k) for k in kids), 10)


def _children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        out += [int(k) for k in (task / "children").read_text().split()]
    return out


def _alive(pid: int) -> bool:
    try:
        return "(zombie)" not in Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return False


def test_bad_metrics_in_the_store_break_neither_the_batch_nor_the_summary(tmp_path):
    make_jobs(tmp_path, 2, budget=300)
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--workers", "1", "--no-plots")
    assert r.returncode == 0, r.stderr
    with sqlite3.connect(out / "results.sqlite") as db:
        db.execute("UPDATE runs SET metrics = '{not json' WHERE job = 'job0'")
        db.execute("UPDATE runs SET metrics = '[1, 2]', cost = 'cheap' WHERE job = 'job1'")
    r = cli("batch", "--summary", out)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    assert "job0" in r.stdout and "job1" in r.stdout
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--workers", "1", "--no-plots")
    assert r.returncode == 0 and "2 already done" in r.stdout, r.stderr
    with open(out / "summary.csv", newline="") as fh:
        table = {row["job"]: row for row in csv.DictReader(fh)}
    assert table["job0"]["rms_error_db"] == "" and table["job1"]["cost"] == ""  # unreadable: empty, not a crash


def test_a_damaged_finished_stage_is_redone_on_resume(tmp_path):
    """fit done, its result.json then truncated: the next batch with fit,snap redoes fit and goes on; the other
    job continues from its intact fit."""
    make_jobs(tmp_path, 2, budget=300)
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--workers", "1", "--no-plots")
    assert r.returncode == 0, r.stderr
    before = rows(out)
    damaged = out / "job0" / "fit" / "result.json"
    damaged.write_text(damaged.read_text()[:100])
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit,snap", "--workers", "1", "--no-plots")
    assert r.returncode == 0, r.stderr
    after = rows(out)
    assert all(v[0] == "done" for v in after.values()) and len(after) == 4
    assert after[("job0", "fit")][1] > before[("job0", "fit")][1]  # redone
    assert after[("job1", "fit")] == before[("job1", "fit")]  # kept
    assert json.loads(damaged.read_text())["stage"] == "fit"


def test_a_job_that_fails_to_load_is_named_on_stderr_with_its_whole_reason(tmp_path):
    make_jobs(tmp_path, 1, budget=300)
    text = (tmp_path / "job0.toml").read_text()
    far = "data-" + "x" * 80 + "/missing-woofer-response.txt"
    (tmp_path / "nodata.toml").write_text(text.replace('name = "job0"', 'name = "nodata"')
                                          .replace("response = 90", f'response = "{far}"', 1))
    (tmp_path / "badtoml.toml").write_text(text.replace('name = "job0"', 'name = "badtoml"') + "\n[grid\n")
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--workers", "1", "--no-plots")
    assert r.returncode == 1
    got = rows(out)
    reasons = {job: v[3] for (job, _), v in got.items() if v[0] == "failed"}
    assert set(reasons) == {"nodata", "badtoml"} and got[("job0", "fit")][0] == "done"
    assert far in reasons["nodata"] and len(reasons["nodata"]) > 100
    for job, reason in reasons.items():  # the whole reason, on stderr, one line a job
        assert any(job in line and reason in line for line in r.stderr.splitlines()), (job, r.stderr)
    assert "Traceback" not in r.stderr


def test_a_full_disk_is_one_line_and_leaves_no_temp_file_and_no_running_row(tmp_path):
    """Writing a result fails with ENOSPC (half the bytes written): the batch stops at once with one line, exit 1;
    the temporary file is gone and no row is left running."""
    make_jobs(tmp_path, 3, budget=300)
    out = tmp_path / "out"
    script = ("import errno, os, pathlib, sys\n"
              "real, me = pathlib.Path.write_bytes, os.getpid()\n"
              "def full(self, data):\n"
              "    if os.getpid() != me:\n"  # the coordinator's writes only: workers compute as ever
              "        return real(self, data)\n"
              "    real(self, data[:len(data) // 2])\n"
              "    raise OSError(errno.ENOSPC, 'No space left on device')\n"
              "pathlib.Path.write_bytes = full\n"
              "from xo_fit.cli.app import main\n"
              "sys.exit(main(sys.argv[1:]))\n")
    r = subprocess.run([sys.executable, "-c", script, "batch", str(tmp_path / "*.toml"), "--out", str(out),
                        "--stages", "fit,snap", "--workers", "1", "--no-plots"], capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 1, r.stderr
    assert "No space left on device" in one_line(r.stderr)
    got = statuses(out)
    assert "running" not in got.values() and "interrupted" in got.values(), got
    assert [p.name for p in out.rglob("*") if p.name.startswith(".") and p.name != ".lock"] == []


def test_a_bogus_or_a_dead_scheduler_is_one_line(tmp_path):
    """--scheduler garbage:// is bad input (exit 2); a scheduler killed (-9) while its jobs run stops the batch:
    one line, exit 1, every unfinished stage interrupted."""
    need("distributed")
    long_jobs(tmp_path, 3)
    r = cli("batch", tmp_path / "job0.toml", "--out", tmp_path / "g", "--scheduler", "garbage://x:1", "--no-plots",
            timeout=120)
    assert r.returncode == 2 and "not a Dask scheduler address" in one_line(r.stderr)
    info, log = tmp_path / "scheduler.json", open(tmp_path / "scheduler.log", "w")
    procs = [subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port",
                               "0", "--dashboard-address", "127.0.0.1:0", "--scheduler-file", str(info)],
                              stdout=log, stderr=log)]
    try:
        assert wait_for(lambda: json.loads(info.read_text())["address"])
        procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", "--scheduler-file",
                                       str(info), "--nthreads", "1", "--no-dashboard"],
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        assert wait_for(lambda: "Register worker" in (tmp_path / "scheduler.log").read_text(), 120)
        out = tmp_path / "out"
        batch = subprocess.Popen([sys.executable, "-m", "xo_fit", "batch", str(tmp_path / "*.toml"), "--out",
                                  str(out), "--stages", "fit", "--scheduler", json.loads(info.read_text())["address"],
                                  "--no-plots"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        procs.append(batch)
        assert wait_for(lambda: "Receive client connection" in (tmp_path / "scheduler.log").read_text(), 120)
        time.sleep(3.0)  # the jobs sent
        procs[0].kill()
        _, err = batch.communicate(timeout=120)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
            p.wait()
        log.close()
    assert batch.returncode == 1, err
    assert "lost the Dask scheduler" in one_line(err)
    assert set(statuses(out).values()) == {"interrupted"}


def test_a_sweep_over_the_maximum_is_refused_before_any_variant_is_built(tmp_path, write_job):
    """400 x 400 values: 160,000 variants, over the documented 100,000: one line naming [sweep] and the count,
    at once (expanding them would take minutes)."""
    from xo_fit.errors import JobError
    from xo_fit.job.sweep import MAX_VARIANTS, expand_job

    text, _ = ladder_job("LR2")
    seeds = ", ".join(str(i) for i in range(1, 401))
    fcs = ", ".join(str(1000 + i) for i in range(400))
    job = write_job(text + f'\n[sweep]\n"search.seed" = [{seeds}]\n"target.way.woofer.fc" = [{fcs}]\n')
    assert MAX_VARIANTS == 100_000
    t = time.perf_counter()
    with pytest.raises(JobError, match=r"\[sweep\].*160,000 variants"):
        expand_job(job)
    assert time.perf_counter() - t < 5.0
    r = cli("batch", job, "--out", tmp_path / "out", "--no-plots", timeout=60)  # a bad job file: it fails alone
    assert r.returncode == 1 and "160,000 variants" in one_line(r.stderr) and "[sweep]" in r.stderr
    r = cli("check", job, timeout=60)
    assert r.returncode == 2 and "160,000 variants" in one_line(r.stderr)


def test_names_a_spreadsheet_would_run_are_neutralised_in_the_summary(tmp_path):
    """OWASP, CSV injection: a cell beginning with = + - @ is a formula to a spreadsheet; summary.csv gives it a
    leading apostrophe."""
    text, _ = ladder_job("LR2", start=1.5, spread=4.0)
    names = ["=1+2", "@SUM(1)", "+cmd", "-2+3"]
    for i, name in enumerate(names):
        (tmp_path / f"j{i}.toml").write_text(f"name = {json.dumps(name)}\n" + text + "\n[search]\nbudget = 200\n")
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--workers", "1", "--no-plots")
    assert r.returncode == 0, r.stderr
    with open(out / "summary.csv", newline="") as fh:
        table = list(csv.DictReader(fh))
    assert sorted(row["job"] for row in table) == sorted("'" + n for n in names)
    assert all(row["folder"][0] not in "=+-@" for row in table)
