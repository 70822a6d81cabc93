"""A fuzz harness over every command: any input, disk or signal ends in exit 0, 1, 2 or 130, never a traceback or a hang.

Run it as a script (from the repository root)::

    python tests/fuzz_harness.py --runs 2000 --seed 1 [--keep DIR] [--only CATEGORY,...]

It prints, per category and in all, the runs, the exit codes, the tracebacks (distinct by exception and place,
with one example each), the hangs (a run past its time limit) and the errors longer than one line; with --keep
the cases that went wrong are kept there. tests/test_reliability.py runs a few dozen cases as a `slow` test.

Categories (cases drawn at random from a seed, so a run can be repeated):

measurement   a data file of a two-way job mutated (encodings, truncation, bytes, hostile lines) -> check, simulate
offaxis       an off-axis job whose angle set is mutated (missing, extra, odd angles, broken files) -> check, simulate
job           the job's keys and values mutated (hostile values, typos, dropped lines) -> check, simulate, fit,
              spread, snap, prune with small budgets
inventory     a drawer CSV of random rows -> snap --inventory
result        a result.json (or its spread.csv) edited by hand -> report, export, simulate --from
cli           command-line extremes (budgets, seeds, samples, workers, time limits, series, optimizers, paths)
fault         a FIFO where a file is read, an output onto a file, folder or FIFO, a file-size limit (writes fail as on a
              full disk), SIGINT or SIGTERM at a random moment of fit, prune, spread or simulate
sweep         a [sweep] of variants, some hostile -> batch

Most cases run in this process (fast; a hang is caught by an alarm); signals, file-size limits and batches run
in a child process with a timeout. Exit codes: 0 done, 1 a failure said in one line (a full disk, failed batch
jobs), 2 bad input in one line (typer's usage errors, "Usage: ...", take a few), 130 interrupted.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import random
import re
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import traceback
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path[:0] = [str(ROOT), str(HERE)]

from test_fuzz import DATA, F, HOSTILE_VALUES, LINES  # noqa: E402

ALLOWED = {0, 1, 2, 130}
#: Seconds a case may take in this process (an alarm) or in a child process.
IN_PROCESS_S = 60
CHILD_S = 120


class Hang(BaseException):
    """Raised by the alarm in a case that runs past IN_PROCESS_S."""


@dataclass
class Case:
    category: str
    files: dict  # relative path -> text or bytes; "FIFO" makes a FIFO
    commands: list  # each a list of arguments; "{d}" is the case's folder
    child: bool = False  # run in a child process
    fsize: int | None = None  # RLIMIT_FSIZE of the child, bytes
    signal_after: tuple | None = None  # (signal name, seconds) for the child
    prepare: list = field(default_factory=list)  # commands run first, unlimited, whose outcome is not counted


# ----------------------------------------------------------------------------- the cases


def _lines(rng: random.Random, replace: dict | None = None, add: tuple = ()) -> str:
    lines = list(LINES)
    for old, new in (replace or {}).items():
        lines[lines.index(old)] = new
    return "\n".join(lines + list(add)) + "\n"


def _mutate_lines(rng: random.Random, k: int) -> str:
    lines = list(LINES)
    for _ in range(k):
        i = rng.randrange(len(lines))
        kind = rng.choice(["value", "value", "drop", "key", "text", "dup"])
        line = lines[i]
        if kind == "value" and "=" in line:
            lines[i] = line.split("=", 1)[0] + "= " + rng.choice(HOSTILE_VALUES + EXTRA_VALUES)
        elif kind == "drop":
            lines[i] = ""
        elif kind == "key" and "=" in line:
            lines[i] = rng.choice(["dcrr", "raiting", "samples", "optimizer", "robust", "series", "top_up",
                                   "tolerance", "impedance_min", "x", " ", "a.b", "mirror"]) + " =" + line.split("=", 1)[1]
        elif kind == "text":
            lines[i] = line + rng.choice(["\x00", "\x1b[31m", " # c", "]", "[", "\"", "\\", "é", "\u2028"])
        elif kind == "dup":
            lines.insert(i, line)
    return "\n".join(lines) + "\n"


EXTRA_VALUES = ['"ng-Nope"', '"ng-CMA"', '"scipy-de"', '"E7"', '"100%"', '"99%"', '"150%"', "1e300", "-1e300",
                '"gnd"', '["gnd", "0"]', '["in", "GND"]', '"L1\\n"', '"=cmd"', '"\\u001b[31m"', "2000000000",
                "1099511627776", '"1e-300"', '{ samples = 3 }', '{ samples = 0 }', '"minimum"', '"order2"',
                '"slope"', '"listening_window"']


def measurement(rng: random.Random) -> Case:
    name = rng.choice(sorted(DATA))
    raw = DATA[name].encode()
    op = rng.choice(["utf16", "utf16-odd", "truncate", "bytes", "line", "columns", "decimal-comma", "huge"])
    if op == "utf16":
        raw = DATA[name].encode("utf-16")
    elif op == "utf16-odd":
        raw = DATA[name].encode("utf-16")[:-1]
    elif op == "truncate":
        raw = raw[:rng.randrange(len(raw) + 1)]
    elif op == "bytes":
        at = rng.randrange(len(raw) + 1)
        raw = raw[:at] + bytes(rng.randrange(256) for _ in range(rng.randrange(1, 20))) + raw[at:]
    elif op == "line":
        rows = DATA[name].splitlines()
        rows[rng.randrange(len(rows))] = rng.choice(
            ["1e30 1e30 1e30", "100 nan 0", "100 inf", "-5 80 0", "0 80 0", "100 1e6", "100 -1e5 0", "1e308 80 0",
             "5e-324 80", "100;80;0", "100,5 80,2", "100 80 1e308", "100 0 0", "x y z", "100 80 0 0 0 0", ""])
        raw = ("\n".join(rows) + "\n").encode()
    elif op == "columns":
        raw = "\n".join(";".join(r.split()) for r in DATA[name].splitlines()).encode()
    elif op == "decimal-comma":
        raw = DATA[name].replace(".", ",").encode()
    elif op == "huge":
        raw = (DATA[name] * rng.choice([2, 50])).encode()  # not rising: repeated
    files = {**DATA, name: raw, "job.toml": _lines(rng)}
    return Case("measurement", files, [["check", "{d}/job.toml"],
                                       ["simulate", "{d}/job.toml", "--out", "{d}/o", "--no-plots"]])


def _angle_job(rng: random.Random) -> dict:
    """A two-way off-axis job: both drivers with horizontal angle files (flat curves, a little apart)."""
    angles = [10, 20, 30, 45, 60, 90]
    files = dict(DATA)
    for drv in ("w", "t"):
        for a in angles:
            files[f"{drv}-h{a}.txt"] = "".join(f"{x:.4f} {88 - a / 30 * (1 + i / 60):.3f} {-30 * i / 60:.2f}\n"
                                               for i, x in enumerate(F))
    add = []
    for drv, name in (("w", "woofer"), ("t", "tweeter")):
        add += [f"[driver.{name}.angles]", f'horizontal = "{drv}-h{{angle}}.txt"',
                f"horizontal_angles = [{', '.join(map(str, angles))}]", "mirror = true"]
    return files, add, angles


def offaxis(rng: random.Random) -> Case:
    files, add, angles = _angle_job(rng)
    op = rng.choice(["ok", "missing", "extra", "odd", "broken", "fifo", "listening", "mismatch"])
    replace = {}
    if op == "missing":
        del files[f"t-h{rng.choice(angles)}.txt"]
    elif op == "extra":
        add = [x.replace("90]", "90, 120]") for x in add]
    elif op == "odd":
        odd = rng.choice(["-10", "0", "181", "1e9", '"x"', "10.5", "10, 10"])
        add = [x.replace("[10,", f"[{odd},") for x in add]
    elif op == "broken":
        files[f"w-h{rng.choice(angles)}.txt"] = rng.choice([b"", b"\xff\xfe\x00", b"100 80\n90 80\n", b"x"])
    elif op == "fifo":
        files[f"w-h{rng.choice(angles)}.txt"] = "FIFO"
    elif op == "listening":
        replace = {'curve = "flat"': 'curve = "flat"\nreference = "listening_window"'}
    elif op == "mismatch":
        add = add[:4] + [x.replace("45, ", "") for x in add[4:]]
    files["job.toml"] = _lines(rng, replace, tuple(add))
    return Case("offaxis", files, [["check", "{d}/job.toml"],
                                   ["simulate", "{d}/job.toml", "--out", "{d}/o", "--no-plots"]])


def job(rng: random.Random) -> Case:
    text = _mutate_lines(rng, rng.randint(1, 4))
    cmd = rng.choice([["check"], ["simulate", "--out", "{d}/o", "--no-plots"],
                      ["fit", "--out", "{d}/o", "--budget", "150", "--no-plots"],
                      ["spread", "--out", "{d}/o", "--samples", "16", "--no-plots"],
                      ["snap", "--out", "{d}/o", "--no-plots"],
                      ["prune", "--out", "{d}/o", "--budget", "40", "--no-plots"]])
    return Case("job", {**DATA, "job.toml": text}, [[cmd[0], "{d}/job.toml", *cmd[1:]]])


def inventory(rng: random.Random) -> Case:
    rows = []
    for _ in range(rng.randint(0, 12)):
        rows.append(",".join(rng.choice([["L", "1mH", "2"], ["C", "10uF", "1"], ["R", "2R2", "3"], ["L", "x", "1"],
                                          ["C", "-1uF"], ["R", "1e300", "1"], ["Q", "1", "1"], ["L", "1mH", "-1"],
                                          ["C", "4.7uF", "1e9"], ["L", "0.4mH"], ["kind", "value", "count"],
                                          ["# c"], [""], ["C", "6.8uF", "99999999999999999999"],
                                          ["R", "2R2", "1.5"], ["L", "1mH", "2", "extra"]])))
    raw = "\n".join(rows).encode()
    if rng.random() < 0.15:
        raw = raw.decode().encode("utf-16")
    args = ["snap", "{d}/job.toml", "--inventory", "{d}/drawer.csv", "--out", "{d}/o", "--no-plots"]
    if rng.random() < 0.4:
        args += ["--combine", "2"]
    if rng.random() < 0.3:
        args += ["--top-up", rng.choice(["E12", "E7", "none", "e24"])]
    return Case("inventory", {**DATA, "job.toml": _lines(rng), "drawer.csv": raw}, [args])


def _result_edit(rng: random.Random, doc: dict) -> str:
    def paths(x, prefix=(), depth=0):
        out = [prefix] if prefix else []
        if depth < 6:
            items = x.items() if isinstance(x, dict) else enumerate(x) if isinstance(x, list) else ()
            for k, v in list(items)[:40]:
                out += paths(v, prefix + (k,), depth + 1)
        return out

    hostile = [None, True, 0, -1, 1e308, 5e-324, "", "<script>alert(1)</script>", "$\\frac{$", "x" * 3000,
               "\x1b[31m", "a\nb", [], [1, "2"], {}, {"a": []}, "fit", "spread", "prune", "/dev/zero", "\x00",
               {"steps": [], "chosen_step": 0, "max_increase": 0.1}, {"connection": "series", "parts": []}]
    all_paths = paths(doc)
    for _ in range(rng.randint(1, 3)):
        p = rng.choice(all_paths)
        try:
            target = doc
            for k in p[:-1]:
                target = target[k]
            if rng.random() < 0.2 and isinstance(target, dict):
                del target[p[-1]]
            else:
                target[p[-1]] = rng.choice(hostile)
        except (KeyError, IndexError, TypeError):
            pass
    text = json.dumps(doc)
    if rng.random() < 0.4:
        spots = [m.end() for m in re.finditer(r'": -?\d', text)]
        if spots:
            at = rng.choice(spots) - 1
            end = re.match(r"-?[\d.eE+-]+", text[at:]).end()
            text = text[:at] + rng.choice(["Infinity", "NaN", "1e999", "9" * 400, "-" + "9" * 40]) + text[at + end:]
    return text


def result(rng: random.Random, made: dict) -> Case:
    stage = rng.choice(sorted(made))
    src = made[stage]
    files = {f"r/{p.name}": p.read_bytes() for p in src.iterdir() if p.is_file()}
    doc = json.loads(files["r/result.json"])
    files["r/result.json"] = _result_edit(rng, doc)
    if "r/spread.csv" in files and rng.random() < 0.3:
        rows = files["r/spread.csv"].decode().splitlines()
        files["r/spread.csv"] = "\n".join(rng.choice([rows[:rng.randrange(len(rows))], rows[:1] + rows[2:],
                                                      [r.replace(",", ",inf,", 1) for r in rows]]))
    files["job.toml"] = _lines(rng)
    files.update(DATA)
    return Case("result", files, [["report", "{d}/r", "--out", "{d}/report"], ["export", "{d}/r", "--spice", "{d}/x.cir"],
                                  ["simulate", "{d}/job.toml", "--from", "{d}/r", "--out", "{d}/s", "--no-plots"]])


def cli(rng: random.Random) -> Case:
    extremes = {
        # a budget of 10^9 runs as long as it is asked to: only with a time limit (or it is no hang but a long job)
        "fit": [rng.choice([["--budget", rng.choice(["0", "1", "3", "10000000000", "-5", "x"])],
                            ["--budget", "1000000000", "--time-limit", "3"],
                            ["--time-limit", rng.choice(["0", "nan", "inf", "-1", "1e-9", "1e300"])]]),
                ["--seed", rng.choice(["-1", "0", str(2**64), str(2**70), "1e3"])],
                ["--workers", rng.choice(["0", "1", "2", "65", "1000"])],
                ["--optimizer", rng.choice(["de", "scipy-de", "ng-Nope", "garbage", "", "auto", "ng-"])]],
        "spread": [["--samples", rng.choice(["0", "1", "2", str(2**40), "100000001", "-1"])],
                   ["--seed", rng.choice(["-1", str(2**70)])]],
        "snap": [["--series", rng.choice(["E7", "L=E12,C=E7", "L=,C=E12", "=", "E24", "none", "X=E12", "L=E12,L=E6"])],
                 ["--combine", rng.choice(["0", "1", "2", "3"])], ["--top-up", rng.choice(["E7", "E12", ""])],
                 ["--inventory", rng.choice(["{d}/missing.csv", "{d}", "{d}/job.toml"])]],
        "prune": [["--budget", rng.choice(["1", "2", "30"])], ["--max-increase", rng.choice(["nan", "-1", "inf", "0"])],
                  ["--workers", rng.choice(["1", "2"])]],
        "simulate": [["--from", rng.choice(["{d}/missing.json", "{d}", "{d}/job.toml", "{d}/w-r.txt"])]],
    }
    command = rng.choice(sorted(extremes))
    opts = [x for group in rng.sample(extremes[command], k=rng.randint(1, len(extremes[command]))) for x in group]
    budget = ["--budget", "100"] if command in ("fit", "prune") and "--budget" not in opts else []
    samples = ["--samples", "16"] if command == "spread" and "--samples" not in opts else []
    out = rng.choice(["{d}/o", "{d}/o", "{d}/job.toml", "{d}/o/deep/er"])
    return Case("cli", {**DATA, "job.toml": _lines(rng)},
                [[command, "{d}/job.toml", "--out", out, "--no-plots", *budget, *samples, *opts]])


def fault(rng: random.Random) -> Case:
    files = {**DATA, "job.toml": _lines(rng)}
    kind = rng.choice(["fifo-in", "fifo-out", "file-out", "dir-out", "fsize", "signal", "signal"])
    if kind == "fifo-in":
        files[rng.choice(sorted(DATA))] = "FIFO"
        return Case("fault", files, [["simulate", "{d}/job.toml", "--out", "{d}/o", "--no-plots"]])
    if kind in ("fifo-out", "file-out", "dir-out"):
        files["target"] = {"fifo-out": "FIFO", "file-out": "a file"}.get(kind, "")
        if kind == "dir-out":
            files["target/inside"] = ""
            files.pop("target")
        cmd = rng.choice([["export", "{d}/done", "--spice", "{d}/target"],
                          ["simulate", "{d}/job.toml", "--out", "{d}/target", "--no-plots"],
                          ["report", "{d}/done", "--out", "{d}/target"],
                          ["export", "{d}/done", "--spice", "{d}/target/x.cir"]])
        return Case("fault", files, [cmd], prepare=[["simulate", "{d}/job.toml", "--out", "{d}/done", "--no-plots"]])
    if kind == "fsize":
        cmd = rng.choice([["simulate", "{d}/job.toml", "--out", "{d}/o"],
                          ["fit", "{d}/job.toml", "--out", "{d}/o", "--budget", "200"],
                          ["report", "{d}/done", "--out", "{d}/o"], ["export", "{d}/done", "--spice", "{d}/o/x.cir"]])
        return Case("fault", files, [cmd], child=True, fsize=rng.choice([0, 1000, 20000, 60000]),
                    prepare=[["simulate", "{d}/job.toml", "--out", "{d}/done", "--no-plots"]])
    cmd = rng.choice([["fit", "{d}/job.toml", "--out", "{d}/o", "--budget", "3000000", "--no-plots"],
                      ["fit", "{d}/job.toml", "--out", "{d}/o", "--budget", "3000000", "--workers", "2", "--no-plots"],
                      ["prune", "{d}/job.toml", "--out", "{d}/o", "--budget", "2000", "--no-plots"],
                      ["spread", "{d}/job.toml", "--out", "{d}/o", "--samples", "200000", "--no-plots"],
                      ["simulate", "{d}/job.toml", "--out", "{d}/o"]])
    return Case("fault", files, [cmd], child=True,
                signal_after=(rng.choice(["SIGINT", "SIGTERM"]), rng.uniform(0.5, 8.0)))


def sweep(rng: random.Random) -> Case:
    values = rng.choice(["[1800, 2200]", "[1, 2]", "[]", "[1e300]", '["x"]', "[0, -1]", "3", "[[1]]"])
    key = rng.choice(['"target.way.woofer.fc"', '"search.seed"', '"part.L1.max"', '"part.NOPE.max"', '"x.y"',
                      '"target.way.woofer.fc, target.way.tweeter.fc"'])
    text = _lines(rng, add=("[sweep]", f"{key} = {values}"))
    if rng.random() < 0.3:
        text = text.replace('name = "fuzz"', rng.choice(['name = "=cmd()"', 'name = "+1"', 'name = "a b"']))
    return Case("sweep", {**DATA, "job.toml": text},
                [["batch", "{d}/job.toml", "--out", "{d}/b", "--stages", rng.choice(["fit", "fit,snap", "fit,spread"]),
                  "--workers", "1", "--no-plots"]], child=True)


# ----------------------------------------------------------------------------- running


@dataclass
class Outcome:
    code: int | None = None
    traceback: str | None = None  # "ExceptionType at file:line"
    hang: bool = False
    lines: int = 0  # stderr lines of an error exit
    detail: str = ""


def _write(folder: Path, files: dict) -> None:
    for rel, content in files.items():
        p = folder / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        if content == "FIFO":
            os.mkfifo(p)
        elif isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_text(content, encoding="utf-8", errors="surrogatepass")


def _in_process(args: list) -> Outcome:
    from xo_fit.cli.app import main

    def alarm(signum, frame):
        raise Hang

    old = signal.signal(signal.SIGALRM, alarm)
    signal.alarm(IN_PROCESS_S)
    err = io.StringIO()
    out = Outcome()
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            out.code = main(args)
    except Hang:
        out.hang = True
    except BaseException as e:  # noqa: BLE001 - any exception escaping main is a traceback for the user
        tb = traceback.extract_tb(e.__traceback__)
        frame = next((f for f in reversed(tb) if "/xo_fit/" in f.filename), tb[-1] if tb else None)
        where = f"{Path(frame.filename).name}:{frame.lineno}" if frame else "?"
        out.traceback = f"{type(e).__name__} at {where}"
        out.detail = "".join(traceback.format_exception(type(e), e, e.__traceback__))[-3000:]
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)
    text = err.getvalue().strip()
    out.lines = len([x for x in text.splitlines() if not x.startswith("warning: ")])
    out.detail = out.detail or text[-600:]
    return out


def _child(args: list, case: Case) -> Outcome:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))

    def limits():
        if case.fsize is not None:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            resource.setrlimit(resource.RLIMIT_FSIZE, (case.fsize, case.fsize))

    proc = subprocess.Popen([sys.executable, "-m", "xo_fit", *args], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True, env=env, preexec_fn=limits, start_new_session=True)
    out = Outcome()
    try:
        if case.signal_after:
            name, after = case.signal_after
            try:
                proc.wait(timeout=after)
            except subprocess.TimeoutExpired:
                proc.send_signal(getattr(signal, name))
        _, err = proc.communicate(timeout=CHILD_S)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.communicate()
        out.hang = True
        return out
    finally:
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.killpg(proc.pid, signal.SIGKILL)  # stray workers of the case
    out.code = proc.returncode
    if "Traceback (most recent call last)" in err:
        places = re.findall(r'File "([^"]*xo_fit[^"]*)", line (\d+)', err)
        kind = re.findall(r"^(\w[\w.]*(?:Error|Exception|Interrupt|Exit)\w*)", err, re.M)
        out.traceback = f"{kind[-1] if kind else '?'} at " + (f"{Path(places[-1][0]).name}:{places[-1][1]}"
                                                                if places else "?")
    text = err.strip()
    out.lines = len([x for x in text.splitlines() if not x.startswith("warning: ")])
    out.detail = text[-3000:]
    return out


def run_case(case: Case, folder: Path) -> list[Outcome]:
    _write(folder, case.files)
    fill = lambda a: [str(x).replace("{d}", str(folder)) for x in a]  # noqa: E731
    for cmd in case.prepare:
        _in_process(fill(cmd))
    outs = []
    for cmd in case.commands:
        outs.append(_child(fill(cmd), case) if case.child else _in_process(fill(cmd)))
    return outs


def made_results(folder: Path) -> dict:
    """A simulate, a fit with a prune section, a snap with combinations and a spread result of the fuzz job."""
    from xo_fit.cli.app import main

    _write(folder, {**DATA, "job.toml": _lines(random.Random(0))})
    job = str(folder / "job.toml")
    runs = {"simulate": ["simulate", job], "spread": ["spread", job, "--samples", "16"],
            "snap": ["snap", job, "--combine", "2"], "prune": ["prune", job, "--budget", "40"]}
    made = {}
    for stage, args in runs.items():
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            if main([*args, "--out", str(folder / stage), "--no-plots"]) == 0:
                made[stage] = folder / stage
    return made


GENERATORS = {"measurement": measurement, "offaxis": offaxis, "job": job, "inventory": inventory, "result": result,
              "cli": cli, "fault": fault, "sweep": sweep}
#: Share of the runs each category gets.
WEIGHTS = {"measurement": 3, "offaxis": 2, "job": 5, "inventory": 2, "result": 4, "cli": 3, "fault": 1, "sweep": 0.3}


def fuzz(runs: int, seed: int, only: list[str] | None = None, keep: Path | None = None, quiet: bool = False) -> dict:
    """Run cases until ``runs`` command runs are done; return the counts (see :func:`report`)."""
    rng = random.Random(seed)
    cats = [c for c in GENERATORS if not only or c in only]
    weights = [WEIGHTS[c] for c in cats]
    stats = {"runs": Counter(), "codes": defaultdict(Counter), "tracebacks": defaultdict(list), "hangs": [],
             "long": [], "seconds": 0.0}
    base = Path(tempfile.mkdtemp(prefix="xo_fit-fuzz-"))
    t0 = time.time()
    made = made_results(base / "made") if "result" in cats else {}
    n = 0
    k = 0
    while n < runs:
        cat = rng.choices(cats, weights)[0]
        case = GENERATORS[cat](rng, made) if cat == "result" else GENERATORS[cat](rng)
        folder = base / f"case{k}"
        k += 1
        outs = run_case(case, folder)
        bad = False
        for cmd, o in zip(case.commands, outs):
            n += 1
            stats["runs"][cat] += 1
            stats["codes"][cat]["hang" if o.hang else o.code] += 1
            label = f"{cat}: {cmd[0]}"
            if o.traceback:
                stats["tracebacks"][o.traceback].append((label, str(folder), o.detail))
                bad = True
            elif o.hang:
                stats["hangs"].append((label, str(folder)))
                bad = True
            elif o.code not in ALLOWED:
                stats["tracebacks"][f"exit {o.code}"].append((label, str(folder), o.detail))
                bad = True
            elif o.code in (1, 2) and o.lines != 1 and cmd[0] != "batch" and not o.detail.startswith("Usage:"):
                stats["long"].append((label, str(folder), o.detail))
        if bad and keep is not None:
            (folder / "commands.txt").write_text("\n".join(" ".join(c) for c in case.prepare + case.commands) + "\n")
            shutil.copytree(folder, keep / folder.name, symlinks=True, ignore_dangling_symlinks=True,
                            ignore=lambda d, names: [x for x in names if (Path(d) / x).is_fifo()])
        shutil.rmtree(folder, ignore_errors=True)
        if not quiet and k % 50 == 0:
            print(f"  {n} runs, {sum(len(v) for v in stats['tracebacks'].values())} tracebacks, "
                  f"{len(stats['hangs'])} hangs, {time.time() - t0:.0f} s", file=sys.stderr)
    stats["seconds"] = time.time() - t0
    shutil.rmtree(base, ignore_errors=True)
    return stats


def report(stats: dict) -> str:
    lines = [f"{sum(stats['runs'].values())} runs in {stats['seconds']:.0f} s"]
    for cat, n in sorted(stats["runs"].items()):
        codes = ", ".join(f"{c}: {m}" for c, m in sorted(stats["codes"][cat].items(), key=lambda x: str(x[0])))
        lines.append(f"  {cat:<12} {n:>5} runs; exit {codes}")
    tbs = stats["tracebacks"]
    lines.append(f"tracebacks: {sum(len(v) for v in tbs.values())} runs, {len(tbs)} distinct")
    for kind, cases in tbs.items():
        label, folder, detail = cases[0]
        lines.append(f"  {kind} ({len(cases)} runs; first: {label}, {folder})")
        lines += ["      " + x for x in detail.strip().splitlines()[-6:]]
    lines.append(f"hangs: {len(stats['hangs'])}" + "".join(f"\n  {a} ({b})" for a, b in stats["hangs"][:10]))
    lines.append(f"errors longer than one line: {len(stats['long'])}"
                 + "".join(f"\n  {a}: {c.strip()[:300]!r}" for a, _, c in stats["long"][:10]))
    return "\n".join(lines)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--only", default="", help="comma-separated categories")
    ap.add_argument("--keep", type=Path, help="a folder for the cases that went wrong")
    a = ap.parse_args()
    if a.keep:
        a.keep.mkdir(parents=True, exist_ok=True)
    stats = fuzz(a.runs, a.seed, [x for x in a.only.split(",") if x] or None, a.keep)
    print(report(stats))
    return 1 if stats["tracebacks"] or stats["hangs"] else 0


if __name__ == "__main__":
    sys.exit(main())
