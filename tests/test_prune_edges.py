"""A prune's edges: a signal between the fit that comes first and step 0, and refit budgets that are no count."""

from __future__ import annotations

import pytest

import xo_fit
from xo_fit.errors import XoFitError

from conftest import ladder_job


def _ctrl_c(*args, **kwargs):
    raise KeyboardInterrupt


@pytest.mark.parametrize("where", ["family", "score"])
def test_a_signal_after_the_first_fit_keeps_the_fit_as_step_0(write_job, monkeypatch, where):
    """Without a design the job is fitted first; Ctrl-C or SIGTERM after that fit and before step 0 is recorded
    (the shared kernel's set-up, the scoring of step 0's refit) must keep the fitted design as step 0, marked
    interrupted, as the steps so far are kept at every other point [CP: docs/outputs.md, the prune section's
    ``interrupted``: "the steps taken so far are kept"]; it escaped as a bare interrupt, the fit lost."""
    from xo_fit.stages import pruning, refitting

    job = xo_fit.load_job(write_job(ladder_job("LR4", start=1.6, spread=3.0)[0]))
    fitted = xo_fit.fit(job)  # the fit the prune runs first: the same search, seed and budget
    if where == "family":
        monkeypatch.setattr(pruning.Family, "of", _ctrl_c)
    else:
        monkeypatch.setattr(refitting, "score", _ctrl_c)
    try:
        pr = xo_fit.prune(job, budget=60)
    except KeyboardInterrupt:
        pytest.fail("the interrupt escaped the prune: the fit that came first was lost")
    assert pr.interrupted and len(pr.steps) == 1 and pr.designs[0].sections["prune"]["interrupted"] is True
    assert pr.steps[0]["cost"] == pytest.approx(fitted.cost, rel=1e-9)
    assert pr.designs[0].sections["prune"]["fit"]["cost"] == fitted.cost


@pytest.mark.parametrize("budget", [-1, 2.5, True, "300"])
def test_a_refit_budget_that_is_no_count_is_refused_before_the_fit(write_job, monkeypatch, budget):
    """``budget`` counts cost evaluations: a negative one gave a prune that said it was interrupted (its step 0
    "stopped before its first evaluation"), 2.5 a TypeError from the search's slicing, True a budget of 1. Each
    is refused up front, naming the argument, before the fit that comes first runs [CP: the project's rule on bad
    input, an XoFitError saying what was expected]. 0 or None is the default."""
    from xo_fit import api

    job = xo_fit.load_job(write_job(ladder_job("LR2", start=1.3, spread=2.0)[0]))
    def no_fit(*args, **kwargs):
        raise AssertionError("the fit ran before the budget was checked")

    monkeypatch.setattr(api, "fit", no_fit)
    with pytest.raises(XoFitError, match="budget"):
        xo_fit.prune(job, budget=budget)


def test_a_job_whose_free_parts_have_only_ranges_is_pruned_from_its_fit(write_job, cli, tmp_path):
    """Without --from the job's values are fitted first (README, docs/outputs.md), and a fit needs no start values
    (free parts with only min and max). ``xo-fit prune`` still computed the job's own values before it, and
    refused such a job ("give it a value to simulate") though the API pruned it [CP: the prune's contract]."""
    import re

    text, _ = ladder_job("LR4", spread=3.0)
    text, n = re.subn(r"\nvalue = [0-9.e+-]+\n(?=min)", "\n", text)
    assert n == 8  # every part's start value gone, its range kept
    path = write_job(text)
    code, out, err = cli("prune", path, "--out", tmp_path / "p", "--budget", "60", "--no-plots")
    assert code == 0, err
    assert "no --from: the job's values fitted first" in out
    rows = (tmp_path / "p" / "prune.csv").read_text().splitlines()
    assert rows[1].startswith("0,8,,,") and len(rows) > 2


def test_a_refit_that_sees_only_singular_designs_is_no_interruption(write_job, monkeypatch):
    """A refit whose every design costs inf (a singular network, not reached by an ordinary netlist) keeps its
    start and goes on; only a refit stopped before its first evaluation is an interruption (Ctrl-C, SIGTERM)."""
    import numpy as np

    import xo_fit
    from conftest import ladder_job
    from xo_fit.model.system import load_system
    from xo_fit.stages import refitting

    text, _ = ladder_job("LR2", start=1.2, spread=3.0)
    system = load_system(xo_fit.load_job(write_job(text)))
    real = refitting.polish_from

    def singular(fn, space, start, **kw):
        return real(lambda u: np.full(len(fn(u)), np.inf), space, start, **kw)
    monkeypatch.setattr(refitting, "polish_from", singular)
    scored, evaluations = refitting.refit(system, 40, 0)
    assert 0 < evaluations <= 40 and np.isfinite(scored.cost)  # not Interrupted: the start kept
    assert np.array_equal(scored.values, system.values())
