"""Cost terms: zero for the exact design, each grows for its own defect; metrics; the closed-form level."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.model.cost import BREAKUP_FLOOR_DB, CostModel
from xo_fit.search.fitting import score
from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system
from xo_fit.model.targets import build_targets

from conftest import ladder_job


def model(write_job, text):
    s = load_system(load_job(write_job(text)))
    return s, CostModel(s, build_targets(s.job, s.frequencies))


@pytest.mark.parametrize("name", ["LR2", "LR4", "BW3"])
def test_exact_handbook_design_costs_nothing(write_job, name):
    """Ideal resistive drivers with the docs/references.md ladders meet their own acoustic targets."""
    text, _ = ladder_job(name, impedance_min=3.0)
    s, cm = model(write_job, text)
    m, ev = cm.metrics(s.values())
    for term, v in ev.terms.items():
        assert v[0] < 1e-5, (term, v)  # coefficients carry 5 digits
    assert m["rms_error_db"] < 3e-3 and m["phase_mismatch_deg"] < 0.1
    assert m["level_db"] == pytest.approx(90 + 20 * np.log10(2.83 / 2.83), abs=1e-3)


def test_wrong_polarity_raises_phase_and_sum(write_job):
    fixed = "band = [100, 15000]\nlevel = 90.0"  # a fixed level: the auto level would follow the null
    good = ladder_job("LR2")[0].replace("band = [100, 15000]", fixed)
    bad = ladder_job("LR2", tweeter_inverted=False)[0].replace("band = [100, 15000]", fixed)
    _, e_good = model(write_job, good)[1].metrics(load_system(load_job(write_job(good))).values())
    s, cm = model(write_job, bad)
    m, e_bad = cm.metrics(s.values())
    assert e_bad.terms["phase"][0] > 100 * max(e_good.terms["phase"][0], 1e-6)
    assert e_bad.terms["sum"][0] > 1.0  # the reverse-polarity null
    assert m["phase_mismatch_deg"] > 170
    assert e_bad.terms["way"][0] == pytest.approx(e_good.terms["way"][0], abs=1e-9)  # levels are unchanged


def test_a_dip_below_the_floor_raises_impedance_only(write_job):
    text, _ = ladder_job("LR4", impedance_min=9.0)  # the LR4 pair's |Z| is R = 8 ohm at its lowest
    s, cm = model(write_job, text)
    m, ev = cm.metrics(s.values())
    assert m["impedance_min_ohm"] == pytest.approx(8.0, rel=1e-3)
    short = 20 * np.log10(9 / 8)
    assert short**2 < ev.terms["impedance"][0] <= 2 * short**2 + 1e-12
    assert ev.terms["sum"][0] < 1e-5


def test_wrong_values_raise_way_and_sum(write_job):
    text, truth = ladder_job("LR4")
    s, cm = model(write_job, text)
    v = s.values()
    ev0 = cm.evaluate(v[None])
    v2 = v.copy()
    v2[0] *= 1.5  # the woofer's first coil
    ev = cm.evaluate(v2[None])
    assert ev.terms["way"][0] > 100 * ev0.terms["way"][0]
    assert ev.terms["sum"][0] > 100 * ev0.terms["sum"][0]


def test_auto_level_is_the_closed_form_optimum_of_the_sum_term(write_job):
    text, _ = ladder_job("LR4")
    s, cm = model(write_job, text)
    v = s.values() * np.exp(np.linspace(-0.2, 0.2, s.values().size))
    ev = cm.evaluate(v[None])
    level = ev.level_db[0]
    for delta in (-0.3, -0.01, 0.01, 0.3):
        fixed = load_job(write_job(text.replace("band = [100, 15000]", f"band = [100, 15000]\nlevel = {level + delta}")))
        s2 = load_system(fixed)
        ev2 = CostModel(s2, build_targets(fixed, s2.frequencies)).evaluate(v[None])
        assert ev2.terms["sum"][0] > ev.terms["sum"][0]


def test_deep_stop_band_counts_only_output_above_the_breakup_floor(write_job):
    text, _ = ladder_job("LR4")
    s, cm = model(write_job, text)
    nb = int(cm.band.sum())
    level = np.array([90.0])
    p = np.full((1, 2, nb), 0.0)
    p[0, 0] = 90 + cm.t_way_db[0]
    p[0, 1] = 90 + cm.t_way_db[1]
    assert cm._way(p, level)[0] == pytest.approx(0.0, abs=1e-20)
    deep = cm.stop[0]
    q = p.copy()
    q[0, 0, deep] = 90 - BREAKUP_FLOOR_DB - 5  # harmless depth: shallower than the slope but under the floor
    assert cm._way(q, level)[0] == pytest.approx(0.0, abs=1e-20)
    q[0, 0, deep] = 90 - BREAKUP_FLOOR_DB + 4  # a breakup peak 4 dB over the floor
    assert cm._way(q, level)[0] == pytest.approx(16 * deep.sum() / (2 * nb), rel=1e-12)


def test_simulate_reports_cost_and_metrics(write_job, cli, tmp_path):
    import json

    text, _ = ladder_job("LR4")
    code, out, err = cli("simulate", write_job(text), "--out", tmp_path / "o")
    assert code == 0, err
    r = json.loads((tmp_path / "o" / "result.json").read_text())
    assert r["cost"] < 1e-5 and set(r["cost_terms"]) == {"way", "sum", "phase", "impedance", "stress"}
    assert set(r["metrics"]) == {"rms_error_db", "max_error_db", "phase_mismatch_deg", "impedance_min_ohm",
                                 "impedance_min_hz"}
    assert "cost " in out and "rms" in out
    s = load_system(load_job(write_job(text)))
    assert score(s, s.values()).cost == pytest.approx(r["cost"], rel=1e-9)


def test_an_exact_null_of_the_target_is_one_floor_for_both(write_job):
    """An LR2 pair wired and targeted in phase sums to (1 + s^2)/(1 + s)^2: an exact null at fc (docs/references.md
    [DER]), on a grid point here (2 kHz). The handbook design then matches its target everywhere; the null takes
    no part in the level and costs nothing (it cost 37 when target and response had floors of their own), and
    the fused kernel agrees with the reference."""
    from xo_fit.model.fused import FusedCost

    text, _ = ladder_job("LR2", tweeter_inverted=False)
    text = text.replace('[target.way.tweeter]\n', '[target.way.tweeter]\npolarity = "normal"\n')
    s, cm = model(write_job, text)
    assert (~cm.keep).sum() == 1 and s.frequencies[cm.band][~cm.keep][0] == pytest.approx(2000.0)
    m, ev = cm.metrics(s.values())
    assert ev.cost[0] < 1e-5 and m["rms_error_db"] < 3e-3
    assert m["level_db"] == pytest.approx(90.0, abs=1e-3)
    rng = np.random.default_rng(3)
    values = s.values()[None] * np.exp(rng.uniform(-0.3, 0.3, (16, s.values().size)))
    values[0] = s.values()
    np.testing.assert_allclose(FusedCost(cm)(values), cm.evaluate(values).cost, rtol=1e-9, atol=1e-12)


def test_the_error_breakdown_says_where(write_job):
    """A handbook LR2 with the tweeter's series capacitor 30 % low: the tweeter's way error and the crossover
    region carry most of the error."""
    import xo_fit

    text, truth = ladder_job("LR2")
    d = xo_fit.simulate(xo_fit.load_job(write_job(text)), {"tC0": truth["tC0"] * 0.7})
    b = d.breakdown
    ways = {w["way"]: w for w in b["ways"]}
    assert ways["tweeter"]["rms_db"] > 1.5 * ways["woofer"]["rms_db"]  # the auto level shares some of it out
    assert len(b["crossovers"]) == 1 and b["crossovers"][0]["ways"] == "woofer-tweeter"
    assert 1000 < b["crossovers"][0]["from_hz"] < 2000 < b["crossovers"][0]["to_hz"] < 4000
    assert d.to_json()["error_breakdown"]["sum"]["rms_db"] == pytest.approx(d.metrics["rms_error_db"], rel=1e-9)
