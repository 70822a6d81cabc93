"""Hard limits in the snap and the prune, the breakup rule as a finding, and the limits in the report.

Sources (docs/references.md): Deb's rules (K. Deb 2000) [SRC] as in tests/test_limits.py; the handbook ladder
coefficients of docs/references.md [SRC]; the Linkwitz-Riley magnitudes: LR2 = two cascaded first-order
sections, |H| = 1 / (1 + (f/fc)^2), LR4 = two cascaded second-order Butterworth sections, |H| = 1 / (1 +
(f/fc)^4) (S. H. Linkwitz, JAES 24(1), 1976) [SRC]; a series resistor at the input adds to every |Z| it
feeds, and with the automatic level an equal attenuation of every way costs nothing [DER].
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from xo_fit import api
from xo_fit.job.reader import load_job
from xo_fit.search.fitting import cost_model

from conftest import ladder_job


def _limited(text: str, limits: str) -> str:
    return text + "[limits]\n" + limits + "\n"


# ----------------------------------------------------------------------------- snap


def _every_snap(system, continuous: np.ndarray) -> np.ndarray:
    """Every combination of the snap's choices (E12 neighbours of each continuous value): designs (N, P)."""
    from xo_fit.stages.choices import choices_for

    options = [[c.value for c in choices_for(p.type, v, system.job.snap.series[p.type], lo=p.min, hi=p.max)]
               for p, v in zip(system.job.valued_parts, continuous)]
    return np.array(list(itertools.product(*options)))


def test_the_snap_chooses_the_cheapest_design_that_meets_the_floor(write_job):
    """An LR2 ladder of four free parts (the combinations of E12 neighbours are few: searched exhaustively).
    With a floor between the plain snap's lowest |Z| and the highest any combination reaches, the limited snap
    is the cheapest of the combinations that meet it, found by brute force [SRC Deb]; with an impossible floor it
    is the combination that breaks it least, reported."""
    text, _ = ladder_job("LR2", start=1.13, spread=3.0)
    plain = api.snap(load_job(write_job(text)))
    assert plain.sections["snap"]["exhaustive"]
    system = plain.system
    every = _every_snap(system, system.values())
    cm, _ = cost_model(system)
    sim = system.simulate(every, dense=True)
    zmin = np.min(np.abs(sim.impedance[:, cm.band]), axis=-1)
    cost = cm.evaluate_simulation(sim, every).cost
    z0 = plain.metrics["impedance_min_ohm"]
    assert z0 < zmin.max()
    floor = round((z0 + zmin.max()) / 2, 4)
    limited = api.snap(load_job(write_job(_limited(text, f"impedance_min = {floor}\nbreakup_db = 0"),
                                          name="limited.toml")))
    assert limited.sections["snap"]["exhaustive"]
    meets = zmin >= floor
    assert limited.hard_limits["impedance_min"]["met"] and limited.metrics["impedance_min_ohm"] >= floor
    assert limited.cost == pytest.approx(cost[meets].min(), rel=1e-9)
    assert plain.cost == pytest.approx(cost.min(), rel=1e-9) and plain.metrics["impedance_min_ohm"] < floor
    impossible = api.snap(load_job(write_job(_limited(text, f"impedance_min = {2 * zmin.max():.4f}\nbreakup_db = 0"),
                                             name="impossible.toml")))
    assert not impossible.hard_limits["impedance_min"]["met"]
    assert impossible.metrics["impedance_min_ohm"] == pytest.approx(zmin.max(), rel=1e-9)
    assert [f["limit"] for f in impossible.findings if f["kind"] == "limit_unmet"] == ["impedance_min"]


# ----------------------------------------------------------------------------- prune


def _padded_lr2() -> str:
    """An LR2 two-way (handbook values, fixed) behind a 1 ohm series resistor RS at the input."""
    text, _ = ladder_job("LR2")
    text = text.replace('nodes = ["in", ', 'nodes = ["a", ')
    return text.replace("[target]", '[[part]]\nname = "RS"\ntype = "R"\nnodes = ["in", "a"]\nvalue = 1.0\n'
                                    "[target]", 1)


def test_prune_refuses_a_removal_that_breaks_the_floor(write_job, tmp_path, cli):
    """Shorting RS costs nothing (every way loses the same level [DER]), so the plain prune takes it first; it
    lowers |Z| by about 1 ohm, below a floor the padded design meets: the limited prune refuses it."""
    text = _padded_lr2()
    plain = api.prune(load_job(write_job(text)))
    assert (plain.steps[1]["removed"], plain.steps[1]["how"]) == ("RS", "short")
    start = api.simulate(load_job(write_job(text, name="start.toml")))
    floor = round(start.metrics["impedance_min_ohm"] - 0.3, 3)
    without = start.metrics["impedance_min_ohm"] - 1.0  # roughly: RS shorted
    assert without < floor
    job = write_job(_limited(text, f"impedance_min = {floor}\nbreakup_db = 0"), name="limited.toml")
    code, out, _ = cli("prune", job, "--out", tmp_path / "pruned", "--no-plots")
    assert code == 0
    assert "refused at step 1: RS (short) breaks impedance_min" in out
    pruned = api.prune(load_job(job))
    refused = [t for t in pruned.trials if t.get("refused")]
    assert any(t["removed"] == "RS" and t["how"] == "short" and t["refused"] == ["impedance_min"] for t in refused)
    assert all(r["removed"] != "RS" for r in pruned.steps)
    for d in pruned.designs:  # every step kept the floor
        assert d.metrics["impedance_min_ohm"] >= floor * (1 - 1e-9)


# ----------------------------------------------------------------------------- the breakup rule


def test_no_breakup_finding_on_a_handbook_lr4_pair(write_job):
    """[SRC] the handbook LR4 ladders on flat resistive drivers give the LR4 target itself: 30 dB under the
    level where the stop band begins, 10 dB inside the 20 dB rule."""
    text, _ = ladder_job("LR4")
    d = api.simulate(load_job(write_job(text)))
    assert not [f for f in d.findings if f["kind"] == "breakup"]


def test_a_second_order_network_under_fourth_order_targets_is_found_within_20_db(write_job):
    """LR2 ladders against LR4 way targets: where the LR4 target falls 30 dB under the level (f/fc = (10^1.5 -
    1)^(1/4) = 2.352), the LR2 woofer is only 20 log10(1 + (f/fc)^2) = 16.3 dB under it [SRC]; the tweeter
    mirrors it."""
    text, _ = ladder_job("LR2", fc=2000.0)
    text = text.replace('alignment = "LR"\norder = 2', 'alignment = "LR"\norder = 4')
    d = api.simulate(load_job(write_job(text)))
    found = {f["way"]: f for f in d.findings if f["kind"] == "breakup"}
    assert set(found) == {"woofer", "tweeter"}
    edge = (10**1.5 - 1) ** 0.25
    f = d.system.frequencies
    w = found["woofer"]
    assert w["at_hz"] / 2000.0 >= edge and f[np.searchsorted(f, w["at_hz"]) - 1] / 2000.0 < edge  # the first point
    assert w["margin_db"] == pytest.approx(20 * math.log10(1 + (w["at_hz"] / 2000.0) ** 2) - 20.0, abs=0.01)
    t = found["tweeter"]
    assert 2000.0 / t["at_hz"] >= edge
    assert t["margin_db"] == pytest.approx(20 * math.log10(1 + (2000.0 / t["at_hz"]) ** 2) - 20.0, abs=0.01)
    assert "within 16." in w["text"] and "20 dB rule" in w["text"]


# ----------------------------------------------------------------------------- outputs


def test_limits_come_first_in_result_console_and_report(write_job, tmp_path, cli):
    text, _ = ladder_job("LR4", start=1.2, spread=2.0)
    job = write_job(_limited(text, "impedance_min = 5.0"), name="limited.toml")
    code, out, _ = cli("fit", job, "--out", tmp_path / "fit", "--budget", "3000", "--no-plots")
    assert code == 0
    lines = out.splitlines()
    assert lines[1].startswith("  limit impedance_min 5 ohm: met") and lines[2].startswith("  limit breakup_db 20 dB")
    import json

    doc = json.loads((tmp_path / "fit" / "result.json").read_text())
    assert list(doc)[:5] == ["xo_fit_version", "format", "job", "stage", "limits"]
    assert set(doc["limits"]) == {"impedance_min", "breakup_db"}
    assert set(doc["limits"]["breakup_db"]) >= {"limit", "worst", "at_hz", "met", "way"}
    code, _, _ = cli("report", tmp_path / "fit", "--out", tmp_path / "report")
    assert code == 0
    page = (tmp_path / "report" / "report.html").read_text()
    assert page.index("<h2>Limits</h2>") < page.index("<h2>Metrics</h2>")
    loaded = api.load_result(tmp_path / "fit")  # recomputed from the result alone
    assert loaded.hard_limits["impedance_min"]["worst"] == pytest.approx(doc["limits"]["impedance_min"]["worst"],
                                                                        rel=1e-9)
