"""Overnight batches: resume after kill -9, reruns of changed jobs, a refused second batch, Dask = local pool."""

from __future__ import annotations

import json
import re
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from conftest import ladder_job, need

ROOT = Path(__file__).resolve().parents[1]


def make_jobs(folder: Path, n: int = 4, budget: int = 1500) -> list[Path]:
    paths = []
    for i in range(n):
        text, _ = ladder_job("LR2", start=1.5 + 0.1 * i, spread=4.0)
        text = f'name = "job{i}"\n' + text + f"\n[search]\nbudget = {budget}\nseed = {i + 1}\n[spread]\nsamples = 300\n"
        p = folder / f"job{i}.toml"
        p.write_text(text)
        paths.append(p)
    return paths


def rows(out: Path) -> dict:
    with sqlite3.connect(out / "results.sqlite") as db:
        return {(r[0], r[1]): r[2:] for r in db.execute("SELECT job, stage, status, finished, hash, error FROM runs")}


def cli(*args, timeout=300):
    return subprocess.run([sys.executable, "-m", "xo_fit", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout)


def test_batch_runs_sweeps_and_resumes_without_redoing(tmp_path):
    make_jobs(tmp_path, 2)
    text = (tmp_path / "job0.toml").read_text().replace('name = "job0"', 'name = "swept"')
    (tmp_path / "swept.toml").write_text(text.replace("[search]", '[sweep]\n"search.seed" = [3, 4]\n[search]', 1))
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--workers", "2", "--no-plots")
    assert r.returncode == 0, r.stderr
    first = rows(out)
    assert {job for job, _ in first} == {"job0", "job1", "swept-seed3", "swept-seed4"}
    assert all(v[0] == "done" for v in first.values()) and len(first) == 12
    mtime = (out / "job0" / "snap" / "result.json").stat().st_mtime_ns
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--no-plots")
    assert r.returncode == 0 and "4 already done, 0 run now" in r.stdout
    assert rows(out) == first and (out / "job0" / "snap" / "result.json").stat().st_mtime_ns == mtime
    import csv

    with open(out / "summary.csv", newline="") as fh:
        summary = list(csv.DictReader(fh))
    assert list(summary[0])[:4] == ["job", "sweep_seed", "status", "stage"] and len(summary) == 4
    assert {r["job"]: r["sweep_seed"] for r in summary if r["job"].startswith("swept")} == {"swept-seed3": "3",
                                                                                         "swept-seed4": "4"}
    assert all(0.0 <= float(r["yield_band"]) <= 1.0 and r["yield_limits"] != "" for r in summary)
    assert "seed=3" in r.stdout and "%" in r.stdout  # the console table has the swept value and the yield


def test_kill_minus_nine_then_resume(tmp_path):
    """kill -9 in the middle of a batch, run it again: every job done once, none lost, none redone."""
    make_jobs(tmp_path, 6, budget=4000)
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "xo_fit", "batch", str(tmp_path / "*.toml"), "--out", str(out),
                             "--workers", "1", "--stages", "fit", "--no-plots"], start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 120
    done_before = {}
    while time.time() < deadline:
        if (out / "results.sqlite").exists():
            try:
                done_before = {k: v for k, v in rows(out).items() if v[0] == "done"}
            except sqlite3.Error:
                done_before = {}
            if len(done_before) >= 2:
                break
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    assert 2 <= len(done_before) < 6, done_before
    mtimes = {job: (out / job / "fit" / "result.json").stat().st_mtime_ns for job, _ in done_before}
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--workers", "1", "--stages", "fit", "--no-plots")
    assert r.returncode == 0, r.stderr
    after = rows(out)
    assert all(v[0] == "done" for v in after.values()) and len(after) == 6
    for key, v in done_before.items():
        assert after[key] == v  # same finish time: not redone
    for job, m in mtimes.items():
        assert (out / job / "fit" / "result.json").stat().st_mtime_ns == m
    for i in range(6):
        assert json.loads((out / f"job{i}" / "fit" / "result.json").read_text())["stage"] == "fit"


def test_changed_job_reruns_broken_job_fails_alone_and_a_second_batch_is_refused(tmp_path):
    make_jobs(tmp_path, 2)
    (tmp_path / "broken.toml").write_text((tmp_path / "job0.toml").read_text()
                                           .replace('name = "job0"', 'name = "broken"')
                                           .replace("response = 90", 'response = "missing.txt"', 1))
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--no-plots")
    assert r.returncode == 1  # one job failed ...
    first = rows(out)
    assert first[("broken", "fit")][0] == "failed" and "missing.txt" in first[("broken", "fit")][3]
    assert first[("job0", "fit")][0] == "done" and first[("job1", "fit")][0] == "done"  # ... alone
    # change job1: it reruns, job0 does not
    p = tmp_path / "job1.toml"
    p.write_text(p.read_text().replace("budget = 1500", "budget = 1600"))
    (tmp_path / "broken.toml").unlink()
    r = cli("batch", tmp_path / "job*.toml", "--out", out, "--stages", "fit", "--no-plots")
    assert r.returncode == 0, r.stderr
    second = rows(out)
    assert second[("job0", "fit")] == first[("job0", "fit")]
    assert second[("job1", "fit")][1] > first[("job1", "fit")][1] and second[("job1", "fit")][2] != first[("job1", "fit")][2]
    # a second batch while one holds the folder
    import fcntl

    with open(out / ".lock", "a+") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        r = cli("batch", tmp_path / "job*.toml", "--out", out, "--no-plots")
    assert r.returncode == 2 and "another batch is running on this folder" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_unreachable_scheduler_is_bad_input(tmp_path):
    need("distributed")
    make_jobs(tmp_path, 1)
    r = cli("batch", tmp_path / "job0.toml", "--out", tmp_path / "o", "--scheduler", "tcp://127.0.0.1:9",
            "--no-plots", timeout=120)
    assert r.returncode == 2 and "cannot reach the Dask scheduler" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_dask_local_cluster_gives_the_local_pool_results(tmp_path):
    distributed = need("distributed")
    make_jobs(tmp_path, 3)
    local = tmp_path / "local"
    r = cli("batch", tmp_path / "job*.toml", "--out", local, "--workers", "2", "--no-plots")
    assert r.returncode == 0, r.stderr
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address="127.0.0.1:0")  # loopback only, any free port
    try:
        r = cli("batch", tmp_path / "job*.toml", "--out", tmp_path / "dask", "--scheduler", cluster.scheduler_address,
                "--no-plots")
        assert r.returncode == 0, r.stderr
    finally:
        cluster.close()
    for i in range(3):
        for stage in ("fit", "snap", "spread"):
            a = json.loads((local / f"job{i}" / stage / "result.json").read_text())
            b = json.loads((tmp_path / "dask" / f"job{i}" / stage / "result.json").read_text())
            assert a["parts"] == b["parts"] and a["cost"] == b["cost"], (i, stage)


def test_unsafe_job_names_are_refused_and_folders_are_unique_per_job(tmp_path, cli):
    """A job named '..' or 'x/y' is bad input (exit 2); names that clean to the same text get their own folders."""
    from xo_fit.batch.collect import folder_name as _folder_name

    text, _ = ladder_job("LR2")
    for name in ("..", ".", "x/y", "a\\b"):
        (tmp_path / "j.toml").write_text(f"name = {json.dumps(name)}\n" + text)
        code, out, err = cli("check", tmp_path / "j.toml")
        assert code == 2 and "cannot name files and folders" in err, (name, err)
    names = ["x_y", "x y", "x:y", "plain-name.1", "é"]
    folders = [_folder_name(n) for n in names]
    assert len(set(folders)) == len(names)
    assert folders[0] == "x_y" and folders[3] == "plain-name.1"
    assert all(re.fullmatch(r"[A-Za-z0-9_.=-]+", f) and f not in (".", "..") for f in folders)


def _children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        kids = (task / "children").read_text().split()
        out += [int(k) for k in kids]
    return out


def test_killing_the_coordinator_alone_leaves_no_worker_and_no_lock(tmp_path):
    """kill -9 of the batch process only (not its group): its workers end with it, the lock goes with them, and
    the next run finishes the batch."""
    make_jobs(tmp_path, 4, budget=60000)
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "xo_fit", "batch", str(tmp_path / "*.toml"), "--out", str(out),
                             "--workers", "2", "--stages", "fit", "--no-plots"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.time() + 60
    kids: list[int] = []
    while time.time() < deadline and not kids:
        time.sleep(0.1)
        kids = _children(proc.pid)
    assert kids, "no worker started"
    proc.kill()
    proc.wait()
    deadline = time.time() + 10
    while time.time() < deadline and any(Path(f"/proc/{k}").exists() and
                                         "zombie" not in Path(f"/proc/{k}/status").read_text() for k in kids):
        time.sleep(0.1)
    alive = [k for k in kids if Path(f"/proc/{k}").exists() and "(zombie)" not in Path(f"/proc/{k}/status").read_text()]
    assert not alive, alive
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--workers", "2", "--stages", "fit", "--no-plots")
    assert r.returncode == 0, r.stderr
    assert all(v[0] == "done" for v in rows(out).values()) and len(rows(out)) == 4


def test_a_worker_that_dies_costs_only_its_own_job(tmp_path, monkeypatch):
    """A worker killed in its second stage: its first stage is kept, the job is tried once more from there and,
    dying again, recorded failed with the cause; every other job finishes. Stages carry their own times."""
    import xo_fit.batch.tasks as stages
    from xo_fit.batch.runner import run_batch

    make_jobs(tmp_path, 3, budget=800)
    real = stages.snap_stage

    def snap_or_die(system, *args, **kwargs):
        if system.job.name == "job1":
            os.kill(os.getpid(), signal.SIGKILL)
        return real(system, *args, **kwargs)

    monkeypatch.setattr(stages, "snap_stage", snap_or_die)
    out = tmp_path / "out"
    rep = run_batch([str(tmp_path / "*.toml")], out, ["fit", "snap"], workers=2, plots=False)
    assert rep.done == 2 and rep.failed == 1
    with sqlite3.connect(out / "results.sqlite") as db:
        got = {(r[0], r[1]): r[2:] for r in db.execute("SELECT job, stage, status, started, finished, error FROM runs")}
    assert got[("job1", "fit")][0] == "done" and (out / "job1" / "fit" / "result.json").is_file()
    assert got[("job1", "snap")][0] == "failed" and "signal 9" in got[("job1", "snap")][3]
    assert "twice" in got[("job1", "snap")][3]
    for job in ("job0", "job2"):
        fit, snap = got[(job, "fit")], got[(job, "snap")]
        assert fit[0] == snap[0] == "done"
        assert fit[1] < fit[2] <= snap[1] < snap[2]  # each stage's own start and end


def test_store_and_folder_faults_are_one_line(tmp_path):
    make_jobs(tmp_path, 1)
    out = tmp_path / "out"
    out.mkdir()
    (out / "results.sqlite").write_bytes(b"SQLite format 3\x00" + b"\x13" * 200)  # truncated, damaged
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--stages", "fit", "--no-plots")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and "damaged" in r.stderr, r.stderr
    (tmp_path / "file").write_text("")
    r = cli("batch", tmp_path / "*.toml", "--out", tmp_path / "file" / "out", "--stages", "fit", "--no-plots")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and "--out" in r.stderr, r.stderr


def test_resume_after_a_stage_folder_was_deleted(tmp_path):
    import shutil

    make_jobs(tmp_path, 2)
    out = tmp_path / "out"
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--workers", "1", "--stages", "fit,snap", "--no-plots")
    assert r.returncode == 0, r.stderr
    before = rows(out)
    shutil.rmtree(out / "job0" / "fit")
    r = cli("batch", tmp_path / "*.toml", "--out", out, "--workers", "1", "--stages", "fit,snap", "--no-plots")
    assert r.returncode == 0, r.stderr
    after = rows(out)
    assert (out / "job0" / "fit" / "result.json").is_file()
    assert after[("job0", "fit")][1] > before[("job0", "fit")][1]  # redone
    assert after[("job1", "fit")] == before[("job1", "fit")]  # untouched


def test_a_scheduler_without_workers_is_said_not_waited_on(tmp_path, monkeypatch):
    distributed = need("distributed")
    import xo_fit.batch.runner as batch
    from xo_fit.errors import XoFitError
    import xo_fit.batch.cluster as cluster

    make_jobs(tmp_path, 1)
    monkeypatch.setattr(cluster, "DASK_WORKER_WAIT", 1.0)
    cluster = distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                                       dashboard_address="127.0.0.1:0")  # loopback only, no worker
    try:
        with pytest.raises(XoFitError, match="no Dask worker is connected"):
            batch.run_batch([str(tmp_path / "*.toml")], tmp_path / "out", ["fit"], scheduler=cluster.scheduler_address)
    finally:
        cluster.close()
    assert not any(v[0] == "running" for v in rows(tmp_path / "out").values())


def test_a_variant_run_on_a_system_kept_from_another_gives_what_a_fresh_load_gives(tmp_path):
    """One worker runs a seed sweep: its second variant reuses the system loaded for the first (seeds are not
    loaded). Its result equals the one computed from a fresh load of that variant (the fit command's path)."""
    from xo_fit.batch import worker
    from xo_fit.batch.tasks import fit_stage
    from xo_fit.job.sweep import expand_job
    from xo_fit.model.system import load_system

    text, _ = ladder_job("LR2", start=1.5, spread=4.0)
    job = tmp_path / "s.toml"
    job.write_text(text + '\n[search]\nbudget = 600\n[sweep]\n"search.seed" = [3, 4]\n')
    out = tmp_path / "out"
    r = cli("batch", job, "--out", out, "--workers", "1", "--stages", "fit", "--no-plots")
    assert r.returncode == 0, r.stderr
    (first, d0), (variant, d1) = expand_job(job)
    fresh = load_system(variant)
    result = fit_stage(fresh, tmp_path / "fresh", plots=False)
    kept = json.loads((out / "s-seed4" / "fit" / "result.json").read_text())
    assert kept["parts"] == result.document["parts"] and kept["cost"] == result.document["cost"]
    # in one process: the second variant gets the first's system, rebound to itself
    payload = {"source": str(job.resolve()), "data": "one data key"}
    a = worker.kept_system(first, d0, payload, load_system)
    b = worker.kept_system(variant, d1, payload, load_system)
    assert b.network is a.network and b.job is variant and b.job.search.seed == 4
    assert b.warnings == fresh.warnings and np.array_equal(b.factors, fresh.factors)


def test_a_worker_keeps_parsed_curves_by_their_bytes_and_reads_supplied_files(tmp_path):
    """Kept curves: the same bytes give the same (read-only) curve without a parse; changed bytes a new one.
    Supplied files (a cluster worker's): read instead of the disk, which need not hold them."""
    from xo_fit.errors import supplied_files
    from xo_fit.io import measure

    p = tmp_path / "r.txt"
    p.write_text("100 80\n1000 85\n10000 82\n")
    measure.keep_curves(True)
    try:
        a, b = measure.read_curve(p, "response"), measure.read_curve(p, "response")
        assert a is b and not a.magnitude.flags.writeable
        p.write_text("100 70\n1000 75\n10000 72\n")
        c = measure.read_curve(p, "response")
        assert c is not a and list(c.magnitude) == [70.0, 75.0, 72.0]
    finally:
        measure.keep_curves(False)
    gone = tmp_path / "elsewhere" / "w.txt"
    with supplied_files({str(gone): b"20 1\n20000 2\n"}):
        assert list(measure.read_curve(gone, "response").magnitude) == [1.0, 2.0]
    with pytest.raises(Exception, match="not found"):
        measure.read_curve(gone, "response")


def test_sweep_names_and_columns_keep_every_swept_path(tmp_path):
    """Sweeping target.way.woofer.fc and target.way.tweeter.fc once named variants "fc300-fc2500" and kept only
    the tweeter's value in summary.csv: each axis is named by the shortest end of its path that tells it apart."""
    from xo_fit.job.sweep import read_sweep

    text, _ = ladder_job("LR2")
    text += '[sweep]\n"target.way.woofer.fc" = [1800, 2200]\n"target.way.tweeter.fc" = [2000, 2400]\n'
    job = tmp_path / "job.toml"
    job.write_text(text)
    sweep = read_sweep(job)
    names = [sweep.name(c) for c in sweep.combos()]
    assert names[0].endswith("-woofer_fc1800-tweeter_fc2000") and len(set(names)) == 4
    variant, _ = sweep.variant(next(iter(sweep.combos())))
    assert dict(variant.swept) == {"woofer.fc": 1800, "tweeter.fc": 2000}
    assert variant.target.ways[0].fc == 1800 and variant.target.ways[1].fc == 2000
