"""Hard limits ([limits]): the violations in the kernel and the reference, feasibility first in the search.

Sources (docs/references.md): K. Deb, "An efficient constraint handling method for genetic algorithms",
Comput. Methods Appl. Mech. Engrg. 186 (2000) [SRC]: a feasible design beats every infeasible one, of two
infeasible ones the smaller violation wins, of two feasible ones the lower cost; a constrained minimum is never
below the unconstrained one, since its designs are a subset [DER]; the stress and protection judges as
result.json's ``stress`` and ``protection`` define them (docs/job-format.md) [CP].
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from xo_fit import api
from xo_fit.errors import JobError
from xo_fit.job.reader import load_job
from xo_fit.model.fused import FLAG, FusedCost
from xo_fit.model.limits import NAMES
from xo_fit.model.system import load_system
from xo_fit.search.space import make_space
from xo_fit.search.feasibility import feasibility_key
from xo_fit.search.fitting import cost_model, robust_factors

DATA = Path(__file__).parent / "data"
HARD = DATA / "hard-three-way.toml"
LIMITED = DATA / "limited-three-way.toml"


def _doc(path: Path, limits: dict | None = "keep") -> dict:
    """A job document from a file, its [limits] replaced (None: removed; "keep": as it is)."""
    doc = tomllib.loads(path.read_text())
    if limits != "keep":
        doc.pop("limits", None)
        if limits is not None:
            doc["limits"] = limits
    return doc


def _job(doc: dict):
    return api.load_job(doc, base=DATA)


# ----------------------------------------------------------------------------- the job


def test_limits_table_defaults_and_errors():
    plain = _job(_doc(HARD))
    assert not plain.limits.present and not plain.limits.active
    job = _job(_doc(HARD, {"impedance_min": 3.2}))
    assert job.limits.active and job.limits.impedance_min == 3.2
    assert job.limits.breakup_db == 20.0  # the contract: 20 dB by default when [limits] is present
    with pytest.raises(JobError, match="did you mean 'ratings'"):
        _job(_doc(HARD, {"ratngs": True}))
    with pytest.raises(JobError, match=r"\[limits\] ratings.*|ratings limit needs the drive"):
        _job(_doc(HARD, {"ratings": True}))  # no [stress] drive to judge ratings at
    with pytest.raises(JobError, match="protection limit needs the drive"):
        _job(_doc(HARD, {"protection": True}))


# ----------------------------------------------------------------------------- kernel against reference


def test_the_kernel_computes_each_limits_excess_as_the_reference_does():
    """Every limit active (a floor, two rated resistors, the woofer's xmax and power, the breakup rule): the fused
    kernel's signed excesses agree with the numpy reference (dense solve, band means and maxima) to 1e-9."""
    system = load_system(load_job(LIMITED))
    cm, _ = cost_model(system)
    fused = FusedCost(cm)
    space = make_space(system.job)
    # random designs, a limited fit (inside every limit, on the active ones) and designs about it: both sides
    fitted = api.fit(system, budget=4000).array[space.columns]
    centre = (np.log(fitted) - space.lo) / (space.hi - space.lo)
    rng = np.random.default_rng(3)
    u = np.vstack([rng.random((32, space.dims)), centre[None],
                   np.clip(centre + 0.02 * rng.standard_normal((48, space.dims)), 0, 1)])
    values = space.values(u)
    raw = fused.evaluate_raw(values)
    ev = cm.evaluate(values)
    np.testing.assert_allclose(raw[:, 0], ev.cost, rtol=1e-9)
    col = fused.col_limits
    np.testing.assert_allclose(raw[:, col], ev.violations["total"], rtol=1e-9, atol=1e-12)
    for i, name in enumerate(NAMES, start=1):
        np.testing.assert_allclose(raw[:, col + i], ev.violations[name], rtol=1e-9, atol=1e-9)
        assert np.any(ev.violations[name] > 0) and np.any(ev.violations[name] < 0)  # both sides are exercised
    # the total is the sum of the excesses above 0
    np.testing.assert_allclose(ev.violations["total"], sum(np.maximum(ev.violations[n], 0) for n in NAMES))


def test_a_job_without_limits_keeps_its_kernel():
    """No [limits]: no limit code in the kernel's text, and its output has the columns it always had."""
    system = load_system(load_job(HARD))
    cm, _ = cost_model(system)
    assert cm.limits is None
    fused = FusedCost(cm)
    assert "lim_" not in fused.text()
    assert fused.evaluate_raw(system.values()[None]).shape == (1, FLAG + 1)


# ----------------------------------------------------------------------------- feasibility first


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 1e6), st.sampled_from([0.0, 1e-12, 1e-6, 0.3, 2.0, 50.0])),
                min_size=2, max_size=12))
def test_the_key_orders_designs_by_debs_rules(designs):
    """[SRC] Deb 2000: feasible before infeasible, then the smaller violation, then the lower cost."""
    c = np.array([d[0] for d in designs])
    v = np.array([d[1] for d in designs])
    key = feasibility_key(c, v)
    for i in range(len(designs)):
        for j in range(len(designs)):
            deb = (v[i] == 0 and v[j] > 0) or (v[i] > 0 and v[j] > 0 and v[i] < v[j]) or \
                (v[i] == 0 and v[j] == 0 and c[i] < c[j])
            if deb:
                assert key[i] < key[j]
    assert np.isinf(feasibility_key(np.array([np.inf, 1.0]), np.array([0.0, np.nan]))).all()


@pytest.fixture(scope="module")
def plain_fit():
    return api.fit(_job(_doc(HARD)), budget=6000)


def test_a_floor_just_above_the_plain_fits_minimum_is_met_and_costs_more(plain_fit):
    """[DER] the plain fit dips below the floor, so the constrained optimum costs more; the limited fit meets it."""
    zmin = plain_fit.metrics["impedance_min_ohm"]
    floor = round(zmin * 1.03, 3)
    d = api.fit(_job(_doc(HARD, {"impedance_min": floor, "breakup_db": 0})), budget=6000)
    assert d.metrics["impedance_min_ohm"] >= floor * (1 - 1e-6)
    assert d.hard_limits["impedance_min"]["met"] and d.sections["search"]["violation"] == 0.0
    assert d.cost > plain_fit.cost
    assert not [f for f in d.findings if f["kind"] == "limit_unmet"]


def test_the_polish_through_scipy_optimize_meets_the_floor_too(plain_fit, monkeypatch):
    """Where scipy's compiled SLSQP cannot be loaded on its own (scipy < 1.16), the polish's runs go one after
    another through scipy.optimize.minimize: [DER] as above, the floor is met and costs more."""
    from xo_fit.search import slsqp

    monkeypatch.setattr(slsqp, "_slsqp", lambda: None)
    floor = round(plain_fit.metrics["impedance_min_ohm"] * 1.03, 3)
    d = api.fit(_job(_doc(HARD, {"impedance_min": floor, "breakup_db": 0})), budget=3000)
    assert d.metrics["impedance_min_ohm"] >= floor * (1 - 1e-6) and d.cost > plain_fit.cost


def test_an_impossible_floor_is_reported_with_the_best_violation_found(plain_fit, tmp_path, cli):
    """[DER] with nothing feasible the search minimises the violation: the limited fit's lowest |Z| is above the
    plain fit's; the result says which limit, by how much, and the command exits 0."""
    doc = _doc(HARD, {"impedance_min": 50.0, "breakup_db": 0})
    doc["search"] = {"budget": 6000}
    job = tmp_path / "job.toml"
    job.write_text(_toml(doc))
    code, out, _ = cli("fit", job, "--out", tmp_path / "out", "--no-plots")
    assert code == 0
    assert "limit impedance_min 50 ohm: NOT MET" in out
    res = json.loads((tmp_path / "out" / "result.json").read_text())
    e = res["limits"]["impedance_min"]
    assert not e["met"] and e["limit"] == 50.0 and e["worst"] == res["metrics"]["impedance_min_ohm"]
    assert e["worst"] > plain_fit.metrics["impedance_min_ohm"]
    unmet = [f for f in res["findings"] if f["kind"] == "limit_unmet"]
    assert len(unmet) == 1 and unmet[0]["limit"] == "impedance_min"
    assert unmet[0]["by"] == pytest.approx(50.0 / e["worst"] - 1, rel=1e-9)
    assert "Zobel" in unmet[0]["text"] and "widen the range" in unmet[0]["text"]


def test_a_rated_resistor_the_plain_fit_overloads_stays_within_its_rating():
    """R1 (rated 7 W: 3.5 W programme with the 2x margin) runs over its rating in the plain fit at 50 W; with
    [limits] ratings the fit keeps it within, as result.json's stress judges it [CP]."""
    plain = api.fit(_job(_doc(LIMITED, None)), budget=6000)
    assert plain.stress["R1"]["within_rating"] is False
    d = api.fit(_job(_doc(LIMITED, {"ratings": True, "breakup_db": 0})), budget=6000)
    assert d.stress["R1"]["within_rating"] is True and d.stress["RZ"]["within_rating"] is True
    e = d.hard_limits["ratings"]
    assert e["met"] and e["worst"] <= 1.0 + 1e-9
    assert e["worst"] == pytest.approx(max(d.stress[n]["programme_w"] / (d.stress[n]["rating"] / 2)
                                           for n in ("R1", "RZ")), rel=1e-12)


def _toml(doc: dict) -> str:
    import tomli_w

    return tomli_w.dumps(doc)


@pytest.mark.parametrize("case", ["stress weight", "off axis"])
def test_the_kernel_agrees_with_the_stress_term_and_off_axis(case, tmp_path):
    """The ratings limit sharing its part currents with a [cost] stress term; and an off-axis job (the demo, its
    sum on the listening window, the preference's wider frequency loop) with every limit it can take."""
    if case == "stress weight":
        doc = _doc(LIMITED)
        doc["cost"]["stress"] = 2.0
        system = load_system(_job(doc))
    else:
        from xo_fit.demo import write_scenario

        path = write_scenario(tmp_path)
        text = path.read_text().replace("[cost]\n", "[cost]\npreference = 1.0\n")
        path.write_text(text + "\n[limits]\nimpedance_min = 3.2\nratings = true\nbreakup_db = 20\n")
        system = load_system(load_job(path))
    cm, _ = cost_model(system)
    fused = FusedCost(cm)
    space = make_space(system.job)
    values = space.values(np.random.default_rng(5).random((24, space.dims)))
    raw = fused.evaluate_raw(values)
    ev = cm.evaluate(values)
    np.testing.assert_allclose(raw[:, 0], ev.cost, rtol=1e-9)
    for i, name in enumerate(("total",) + NAMES):
        np.testing.assert_allclose(raw[:, fused.col_limits + i], ev.violations[name], rtol=1e-9, atol=1e-9)


def test_the_reference_cost_path_and_the_robust_fit_keep_the_floor():
    """[cost] protection (a term the kernel lacks: every candidate on the numpy reference) and a robust fit (the
    mean cost over N fixed tolerance builds): the floor holds on the nominal design, as result.json judges it,
    and on every build the robust fit averages over, each judged by its own dense solve (the floor's definition:
    |Z| at least the floor over the band; judged on the nominal design alone, builds fell to 2.86 ohm)."""
    doc = _doc(LIMITED, {"impedance_min": 2.9, "breakup_db": 0})
    doc["cost"]["protection"] = 1.0
    d = api.fit(_job(doc), budget=800)
    assert d.hard_limits["impedance_min"]["met"]
    doc = _doc(HARD, {"impedance_min": 2.9, "breakup_db": 0})
    doc["search"] = {"robust": {"samples": 8}}
    job = _job(doc)
    d = api.fit(job, budget=3000)
    assert d.hard_limits["impedance_min"]["met"] and d.sections["search"]["robust"]["samples"] == 8
    system = load_system(job)
    builds = system.simulate(d.array[None, :] * robust_factors(job), dense=True)
    band = cost_model(system)[0].band
    assert np.all(np.abs(builds.impedance[:, band]).min(axis=1) >= 2.9)


@pytest.mark.parametrize("optimizer, budget", [("scipy-de", 6000), ("ng-TwoPointsDE", 1500)])
def test_other_engines_are_feasibility_first(optimizer, budget, plain_fit):
    """scipy's DE and a nevergrad optimiser see the key of Deb's order: their result meets a floor the plain
    fit breaks."""
    if optimizer.startswith("ng-"):
        pytest.importorskip("nevergrad")
    floor = round(plain_fit.metrics["impedance_min_ohm"] * 1.03, 3)
    d = api.fit(_job(_doc(HARD, {"impedance_min": floor, "breakup_db": 0})), budget=budget, optimizer=optimizer)
    assert d.hard_limits["impedance_min"]["met"] and d.sections["search"]["violation"] == 0.0
