"""The fit: handbook ladders recovered from wrong starts, reproducibility, the impedance floor, stopping early."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

from pathlib import Path

import numpy as np
import pytest

from xo_fit.search.fitting import run_fit
from xo_fit.job.reader import load_job
from xo_fit.search.engines import search
from xo_fit.search.space import make_space
from xo_fit.model.system import load_system

from conftest import ladder_job


def fit_ladder(write_job, name, seed=1, start=2.0, budget=20000, optimizer="auto"):
    text, truth = ladder_job(name, start=start, spread=4.0)
    s = load_system(load_job(write_job(text)))
    out = run_fit(s, seed=seed, budget=budget, optimizer=optimizer)
    return out, truth, s


@pytest.mark.parametrize("name, start", [("LR2", 2.0), ("LR2", 0.5), ("BW3", 2.0), ("BW3", 0.6)])
def test_fit_recovers_handbook_ladders(write_job, name, start):
    """Ideal resistive drivers (flat, zero phase, 8 ohm): the fit of an LR2 or BW3 target with the matching
    ladder from a wrong start finds the docs/references.md handbook values within 1 %."""
    out, truth, s = fit_ladder(write_job, name, start=start)
    for pname, v in zip(s.part_names, out.scored.values):
        assert v == pytest.approx(truth[pname], rel=0.01), pname
    assert out.scored.cost < 1e-4 and out.search.complete


def test_same_seed_same_result_bit_for_bit(write_job):
    a, _, _ = fit_ladder(write_job, "LR2", seed=7, budget=3000)
    b, _, _ = fit_ladder(write_job, "LR2", seed=7, budget=3000)
    np.testing.assert_array_equal(a.scored.values, b.scored.values)
    assert a.scored.cost == b.scored.cost and a.search.evaluations == b.search.evaluations


def test_different_seeds_same_optimum(write_job):
    results = [fit_ladder(write_job, "BW3", seed=seed)[0].scored.values for seed in (11, 12, 13)]
    for r in results[1:]:
        np.testing.assert_allclose(r, results[0], rtol=2e-3)


@pytest.mark.parametrize("optimizer", ["scipy-de", "ng-TwoPointsDE"])
def test_other_engines_run_and_improve(write_job, optimizer):
    out, truth, s = fit_ladder(write_job, "LR2", budget=4000, optimizer=optimizer)
    assert out.search.optimizer == optimizer
    assert out.scored.cost < 0.05 * out.start_cost


PARALLEL = '''\
[grid]
f_min = 50
f_max = 10000
points = 60
[driver.d]
response = 90
impedance = 8
[[part]]
name = "RP"
type = "R"
nodes = ["in", "0"]
value = 2
min = 1
max = 100
[[part]]
name = "D"
type = "driver"
driver = "d"
nodes = ["in", "0"]
[target.way.d]
type = "fullrange"
[cost]
impedance_min = 6.0
'''


def test_fit_avoids_an_impedance_dip_when_a_feasible_design_exists(write_job):
    """A resistor across the input changes nothing acoustically but loads the amplifier: the fit must lift
    it until |Z| = RP || 8 ohm stays above the 6 ohm floor (RP >= 24 ohm)."""
    s = load_system(load_job(write_job(PARALLEL)))
    out = run_fit(s, budget=2000)
    assert out.scored.metrics["impedance_min_ohm"] >= 6.0 - 1e-6
    assert out.scored.values[0] >= 24.0 - 1e-4
    assert out.start_cost > 1.0 and out.scored.cost < 1e-9


def test_time_limit_keeps_the_best_so_far(write_job, cli, tmp_path):
    text, _ = ladder_job("LR4", start=2.0, spread=4.0)
    code, out, err = cli("fit", write_job(text), "--out", tmp_path / "o", "--time-limit", "0", "--no-plots")
    assert code == 0, err
    r = json.loads((tmp_path / "o" / "result.json").read_text())
    assert r["stage"] == "fit" and r["search"]["complete"] is False and r["search"]["stopped_by"] == "time limit"
    assert "INCOMPLETE" in out


def test_ctrl_c_returns_the_best_design_so_far(write_job):
    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    s = load_system(load_job(write_job(text)))
    space = make_space(s.job)
    calls = []

    def fn(u):
        calls.append(1)
        if len(calls) > 5:
            raise KeyboardInterrupt
        return np.sum((u - 0.3) ** 2, axis=1)

    r = search(fn, space, budget=10000)
    assert not r.complete and r.stopped_by == "interrupted" and r.evaluations > 0 and np.isfinite(r.cost)


def test_fit_command_writes_its_files(write_job, cli, tmp_path):
    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    code, out, err = cli("fit", write_job(text), "--out", tmp_path / "o", "--budget", "3000", "--seed", "3")
    assert code == 0, err
    r = json.loads((tmp_path / "o" / "result.json").read_text())
    assert r["search"]["optimizer"] == "de" and r["search"]["seed"] == 3 and r["search"]["evaluations"] <= 3000
    assert r["cost"] < 0.05 and r["metrics"]["rms_error_db"] < 0.2
    assert (tmp_path / "o" / "response.png").stat().st_size > 10000
    import pandas as pd

    t = pd.read_csv(tmp_path / "o" / "response.csv")
    assert t.target_db.notna().all()
    code, _, err = cli("fit", write_job(text), "--out", tmp_path / "p", "--optimizer", "nope")
    assert code == 2 and "unknown optimizer 'nope'" in err


def test_nothing_to_fit_is_bad_input(write_job, cli, tmp_path):
    text, _ = ladder_job("LR2")  # every part fixed
    code, _, err = cli("fit", write_job(text), "--out", tmp_path / "o")
    assert code == 2 and "no free values to fit" in err


def test_a_failing_optimizer_cannot_hang_the_command(write_job, tmp_path):
    """A failing engine that also leaves a non-daemon thread behind (nevergrad's NGOpt under numpy >= 2.4
    does, nevergrad issue 1612): the command still ends promptly, exit 1, with the best design so far kept."""
    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    job = write_job(text)
    script = textwrap.dedent(f'''
        import sys, threading, time
        import numpy as np
        import xo_fit.search.engines as s

        def bad(obj, n, u0, rng):
            obj(np.full((4, n), 0.5))
            threading.Thread(target=time.sleep, args=(120,)).start()
            raise TypeError("boom")

        s.ENGINES["bad"] = bad
        from xo_fit.cli.app import run
        sys.argv = ["xo-fit", "fit", {str(job)!r}, "--out", {str(tmp_path / "o")!r}, "--optimizer", "bad", "--no-plots"]
        run()
    ''')
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 1, proc.stderr
    assert "optimizer failed: TypeError: boom" in proc.stderr
    r = json.loads((tmp_path / "o" / "result.json").read_text())
    assert r["search"]["complete"] is False


def test_workers_run_independent_restarts_and_keep_the_best(write_job, cli, tmp_path):
    text, truth = ladder_job("LR2", start=2.0, spread=4.0)
    job = write_job(text)
    code, out, err = cli("fit", job, "--out", tmp_path / "w", "--workers", "2", "--budget", "2000", "--no-plots")
    assert code == 0, err
    r = json.loads((tmp_path / "w" / "result.json").read_text())
    runs = r["search"]["workers"]
    assert len(runs) == 2 and runs[0]["seed"] == 1 and runs[1]["seed"] != 1
    assert r["cost"] == pytest.approx(min(x["cost"] for x in runs), rel=1e-9, abs=1e-15)
    # one budget shared: each island's global search had half of its 85 % share (850), the polish of the best
    # basins of both shares the rest; the result names the winner's seed
    assert all(x["evaluations"] <= 850 + 300 for x in runs) and r["search"]["evaluations"] <= 2000
    assert r["search"]["seed"] == min(runs, key=lambda x: x["cost"])["seed"]
    # deterministic: the same command gives the same values
    code, _, _ = cli("fit", job, "--out", tmp_path / "w2", "--workers", "2", "--budget", "2000", "--no-plots")
    r2 = json.loads((tmp_path / "w2" / "result.json").read_text())
    assert r2["parts"] == r["parts"]


def test_three_way_with_a_bandpass_midrange_reaches_one_optimum(tmp_path):
    """Two crossover regions and the polarity chain: LR4 everywhere keeps every way normal; seeds agree.
    (The cascaded midrange ladders load each other, so the optimum is not zero: rms about 0.5 dB.)"""
    
    job = load_job(Path(__file__).parent / "data" / "three-way-lr4.toml")
    s = load_system(job)
    results = [run_fit(s, seed=seed, budget=20000) for seed in (1, 5)]
    assert results[0].start_cost > 30
    for r in results:
        assert r.scored.cost < 0.5 and r.scored.metrics["rms_error_db"] < 0.6
        assert r.scored.metrics["phase_mismatch_deg"] < 5
    np.testing.assert_allclose(results[0].scored.values, results[1].scored.values, rtol=1e-3)
    from xo_fit.model.targets import polarities

    assert polarities(job.target.ways) == {"w": 1.0, "m": 1.0, "t": 1.0}


HARD = Path(__file__).parent / "data" / "hard-three-way.toml"


def test_restarts_find_the_better_basin_on_the_hard_three_way():
    """The 16-part three-way of tests/data (band-pass mid with a notch, an L-pad, Zobel, ranges 1/4x..4x): seed
    8 at 20,000 evaluations used to end in a basin 20 % worse (13.53 against 11.23); with restarts it ends within
    0.5 % of the best cost known (11.2323, from 100,000-evaluation runs), and the result says how it got there."""
    s = load_system(load_job(HARD))
    out = run_fit(s, seed=8, budget=20000)
    assert out.scored.cost <= 11.2323 * 1.005
    r = out.search
    assert r.restarts >= 2 and 0 <= r.best_restart < r.restarts and len(r.basins) == r.restarts
    assert r.evaluations <= 20000


@pytest.mark.parametrize("budget", [3000, 7777])
def test_restarts_spend_the_budget_exactly(write_job, budget):
    """Without the polish the budget is spent to the last evaluation (by restarts where runs end early), and
    never exceeded; the engine's every call is counted."""
    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    s = load_system(load_job(write_job(text)))
    from xo_fit.search.fitting import cost_model
    from xo_fit.search.engines import search
    from xo_fit.search.space import make_space

    space = make_space(s.job)
    cm, _ = cost_model(s)
    calls = []

    def fn(u):
        calls.append(len(u))
        return cm.evaluate(space.values(u)).cost

    r = search(fn, space, budget=budget, seed=2, polish=False)
    assert sum(calls) == r.evaluations == budget
    assert r.restarts == len(r.basins) >= 1
