"""`fit --workers N` as islands (xo_fit.search.islands): a migrant really travels the ring, enters by the
feasibility-first order, the islands reach the handbook optimum, a seed gives one result, the budget is shared."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system
from xo_fit.search.feasibility import EpsilonLevel, LIMIT_KEY
from xo_fit.search.fitting import cost_model, fit_problem, restart_seeds, run_fit_restarts, search_problem
from xo_fit.search.islands import Migration, Problem, epochs, polish_plan, run_islands

from conftest import ladder_job


@pytest.fixture(scope="module")
def lr4(tmp_path_factory):
    """The ideal two-way with the 8-part LR4 handbook ladders (docs/references.md), every part 2x off, ranges
    1/4x..4x: its exact design is known."""
    text, truth = ladder_job("LR4", start=2.0, spread=4.0)
    path = tmp_path_factory.mktemp("lr4") / "job.toml"
    path.write_text(text)
    return load_system(load_job(path)), truth


def test_the_best_of_island_one_enters_island_two(lr4):
    """Ring migration: every migrant that entered island 1 at an epoch is island 0's best so far when it posted at
    that epoch or the next it reached (its own history's best at that many evaluations), the migrant's cost
    confirmed by the numpy reference cost (CostModel.evaluate, not the fused kernel the islands ran)."""
    system, _ = lr4
    budget = 12000
    runs, interrupted, _ = run_islands(Problem(search_problem, system), restart_seeds(3, 2), optimizer="de",
                                       budget=budget, time_limit=None, polish=True, exchange=True, keep=True)
    assert not interrupted
    space = fit_problem(system).space
    every, last = epochs(int(budget * 0.85) // 2, space.dims)
    assert last >= 2
    one, two = runs
    assert two.received >= 1 and len(two.migrants) == two.received <= last
    cm, _ = cost_model(system)
    assert [k for k, _ in one.posted] == sorted({k for k, _ in one.posted}) and one.posted[-1][0] <= last
    for epoch, u in two.migrants:
        reference = float(cm.evaluate(space.values(u[None])).cost[0])
        at = next(n for k, n in one.posted if k >= epoch)
        assert at >= epoch * every
        best = next(h[1] for h in one.result.history if h[0] == at)
        assert reference == pytest.approx(best, rel=1e-8, abs=1e-14)


def test_independent_islands_receive_nothing(lr4):
    system, _ = lr4
    runs, _, _ = run_islands(Problem(search_problem, system), restart_seeds(3, 2), optimizer="de", budget=12000,
                             time_limit=None, polish=True, exchange=False)
    assert [r.received for r in runs] == [0, 0] and all(r.result is not None for r in runs)


class _Rank:
    """A constrained JADE run's ranking at epsilon 0 (Deb's order), over a population's costs and violations."""

    def __init__(self, cost, violation):
        self.level = EpsilonLevel.__new__(EpsilonLevel)
        self.level.eps = 0.0
        self.level.cost, self.level.violation = np.array(cost, float), np.array(violation, float)


def test_a_migrant_enters_by_the_feasibility_first_order():
    """[SRC] K. Deb, Comput. Methods Appl. Mech. Engrg. 186 (2000): a feasible design beats every infeasible one,
    of two infeasible ones the smaller violation wins. A migrant with a lower cost that breaks a limit does not
    displace the worst member when that one meets every limit; one that meets them does."""
    pop = np.array([[0.1, 0.1], [0.5, 0.5], [0.9, 0.9]])
    level = _Rank([1.0, 2.0, 3.0], [0.0, 0.0, 0.0]).level
    fit = level.keys(level.cost, level.violation)
    best = [1.0, pop[0].copy()]
    infeasible = (0.01, 0.5, np.array([0.3, 0.3]))
    assert not Migration.enter(infeasible, pop, fit, level, best)
    assert fit.tolist() == [1.0, 2.0, 3.0] and best[0] == 1.0
    feasible = (0.5, 0.0, np.array([0.3, 0.3]))
    assert Migration.enter(feasible, pop, fit, level, best)
    assert pop[2].tolist() == [0.3, 0.3] and fit[2] == 0.5 and level.cost[2] == 0.5 and level.violation[2] == 0
    assert best[0] == 0.5  # the run's best follows it
    # among infeasible members: the smaller violation wins, whatever the costs
    level = _Rank([1.0, 2.0], [0.2, 0.4]).level
    pop, fit = np.array([[0.1, 0.1], [0.2, 0.2]]), level.keys(level.cost, level.violation)
    best = [LIMIT_KEY * 1.2, pop[0].copy()]
    assert Migration.enter((50.0, 0.3, np.array([0.7, 0.7])), pop, fit, level, best)
    assert pop[1].tolist() == [0.7, 0.7] and best[0] == LIMIT_KEY * 1.2
    assert not Migration.enter((0.1, 0.5, np.array([0.8, 0.8])), pop, fit, level, best)


@pytest.mark.parametrize("exchange", [False, True])
def test_two_islands_reach_the_handbook_lr4(lr4, exchange):
    """[SRC] the Linkwitz-Riley 4 ladder coefficients of docs/references.md: two islands sharing a 20,000
    evaluation budget recover every part's handbook value within 1 % from a start 2x off."""
    system, truth = lr4
    out, summary = run_fit_restarts(system, 2, budget=20000, seed=1, exchange=exchange)
    for name, v in zip(system.part_names, out.scored.values):
        assert v == pytest.approx(truth[name], rel=0.01), name
    assert out.scored.cost < 1e-6 and out.search.complete
    assert sum(x["evaluations"] for x in summary) <= 20000  # one budget shared


def test_a_budget_smaller_than_the_workers_is_never_exceeded(lr4):
    """Every island searches at least one design, so a budget of 2 over 3 workers runs 2 islands, not 3
    evaluations (the budget is the whole fit's)."""
    system, _ = lr4
    out, summary = run_fit_restarts(system, 3, budget=2, seed=1)
    assert len(summary) == 2 and sum(x["evaluations"] for x in summary) <= 2


def test_a_robust_fit_on_islands_counts_every_islands_solves(tmp_path):
    """result.json's robust.solves is the evaluations of every island times the draws (each evaluation solves
    one design per draw), the same total as search.evaluations."""
    import xo_fit

    text = ladder_job("LR2", start=2.0, spread=4.0)[0].replace("[target]", "[search]\nrobust = { samples = 4 }\n[target]")
    (tmp_path / "job.toml").write_text(text)
    d = xo_fit.fit(xo_fit.load_job(tmp_path / "job.toml"), budget=600, seed=1, workers=2)
    s = d.sections["search"]
    assert s["evaluations"] == sum(w["evaluations"] for w in s["workers"]) > 0
    assert s["robust"]["solves"] == s["evaluations"] * 4


def test_islands_that_exchange_give_one_result_per_seed(lr4):
    """The exchange is synchronous and ordered by epoch: the same seed and worker count give the same values bit
    for bit, however the processes were scheduled; another seed gives other islands."""
    system, _ = lr4
    a, ra = run_fit_restarts(system, 3, budget=9000, seed=5, exchange=True)
    b, rb = run_fit_restarts(system, 3, budget=9000, seed=5, exchange=True)
    np.testing.assert_array_equal(a.scored.values, b.scored.values)
    assert ra == rb and sum(run.received for run in a.islands["runs"]) >= 1
    c, rc = run_fit_restarts(system, 3, budget=9000, seed=6, exchange=True)
    assert [x["seed"] for x in rc] != [x["seed"] for x in ra]


class _Result:
    def __init__(self, basins, points, violations=()):
        self.basins, self.points, self.basin_violations = tuple(basins), tuple(points), tuple(violations)


class _Run:
    def __init__(self, *args):
        self.result = _Result(*args)


def test_the_polish_goes_to_the_best_distinct_basins_of_all_islands():
    """As one process polishes its best three distinct basins (README), the islands pool theirs: the three best
    distinct costs of all, each polished by the island that found it where that one has none yet, an equal
    share of what is left each; under limits a basin that breaks one comes after every one that meets them."""
    p = [np.full(2, x) for x in (0.1, 0.2, 0.3, 0.4)]
    runs = {0: _Run([5.0, 2.0], p[:2]), 1: _Run([2.0, 3.0], p[2:]), 2: _Run([9.0], p[:1])}
    plan = polish_plan(runs, 900)
    # costs 2.0 (island 0, then 1: the same basin, once), 3.0 (island 1), 5.0 (island 0): three distinct
    assert {i: [(u[0], b) for u, b in v] for i, v in plan.items()} == {0: [(0.2, 300)], 1: [(0.4, 300)],
                                                                         2: [(0.1, 300)]}
    limited = {0: _Run([1.0, 4.0], p[:2], [0.3, 0.0]), 1: _Run([6.0], p[2:3], [0.0])}
    plan = polish_plan(limited, 300)
    order = [u[0] for v in plan.values() for u, _ in v]
    assert sorted(order) == [0.1, 0.2, 0.3] and plan[0][0][0][0] == 0.2 and plan[1][0][0][0] == 0.3
    assert polish_plan(runs, 0) == {}


def _running(pid: int) -> bool:
    """Whether process ``pid`` runs (exists and is no zombie), from /proc."""
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0] != "Z"
    except (FileNotFoundError, ProcessLookupError, IndexError):
        return False


def _descendants(pid: int) -> list[int]:
    """Every process below ``pid`` (its children, theirs, ...), from /proc."""
    try:
        children = [int(x) for x in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except (FileNotFoundError, ProcessLookupError):
        return []
    return children + [d for c in children for d in _descendants(c)]


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="reads /proc")
@pytest.mark.parametrize("workers", [2, 5])
def test_no_island_outlives_a_killed_parent(tmp_path, workers):
    """[CP] kill -9 of `xo-fit fit --workers N` must not leave islands running (they used to block forever on a
    pipe their own fork held open): each notices that its parent is gone at its next batch and ends; with 5, the
    islands forked by other islands (a fork tree, xo_fit.search.forks) too, once the island above them ends."""
    import os
    import signal
    import subprocess
    import sys
    import time

    job = tmp_path / "job.toml"
    job.write_text(ladder_job("LR4", start=2.0, spread=4.0)[0])
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.Popen([sys.executable, "-m", "xo_fit", "fit", str(job), "--out", str(tmp_path / "o"),
                             "--budget", "100000000", "--workers", str(workers), "--no-plots"], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    children: list[int] = []
    deadline = time.monotonic() + 60
    while len(children) < workers and time.monotonic() < deadline:
        time.sleep(0.2)
        children = _descendants(proc.pid)
    if len(children) < workers:
        proc.kill()
        pytest.fail("the islands did not start")
    time.sleep(0.5)  # searching
    proc.kill()
    proc.wait()
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline and any(_running(c) for c in children):
        time.sleep(0.1)
    alive = [c for c in children if _running(c)]
    for c in alive:  # clean up before failing
        os.kill(c, signal.SIGKILL)
    assert not alive
