"""Snapping: never worse than log-nearest rounding, equal to brute force on small problems, drawer counts kept."""

from __future__ import annotations

import itertools
import json
import re

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import xo_fit.stages.choice_search as search_module
from xo_fit.errors import DataError
from xo_fit.search.fitting import cost_model
from xo_fit.model.fused import FusedCost
from xo_fit.job.reader import load_job
from xo_fit.series import nearest
from xo_fit.io.inventory import read_inventory
from xo_fit.stages.choice_search import ChoiceEvaluator, search_choices
from xo_fit.stages.choices import choices_for, log_nearest_index
from xo_fit.stages.snapping import run_snap
from xo_fit.model.system import load_system

from conftest import ladder_job


@pytest.fixture(scope="module")
def bw3_system(tmp_path_factory):
    text, _ = ladder_job("BW3", start=1.0, spread=3.0, impedance_min=6.0)
    path = tmp_path_factory.mktemp("snap") / "job.toml"
    path.write_text(text)
    return load_system(load_job(path))


def log_nearest_cost(system, values):
    cm, _ = cost_model(system)
    rounded = np.array([nearest(v, dict(system.job.snap.series)[p.type]) for v, p in zip(values, system.job.valued_parts)])
    return float(cm.evaluate(rounded[None]).cost[0])


@settings(max_examples=12, deadline=None)
@given(st.lists(st.floats(-0.6, 0.6), min_size=6, max_size=6))
def test_snapped_cost_never_above_log_nearest(bw3_system, logs):
    values = bw3_system.values() * np.exp(np.array(logs))
    out = run_snap(bw3_system, values)
    cm, _ = cost_model(bw3_system)
    snapped = float(cm.evaluate(out.values[None]).cost[0])
    assert snapped <= log_nearest_cost(bw3_system, values) * (1 + 1e-12) + 1e-12
    for sp in out.parts:  # every value is an E-series value of its kind
        assert sp.value == pytest.approx(nearest(sp.value, sp.source), rel=1e-12)


def test_heuristic_search_equals_brute_force_on_a_small_problem(bw3_system, monkeypatch):
    """Force the beam/coordinate path (no exhaustive shortcut) and compare with brute force over the same choices."""
    cm, _ = cost_model(bw3_system)
    fused = FusedCost(cm)
    values = bw3_system.values() * np.exp(np.array([0.31, -0.22, 0.17, -0.4, 0.25, 0.12]))
    parts = bw3_system.job.valued_parts
    options = [choices_for(p.type, v, "E12") for p, v in zip(parts, values)]
    base = np.array([log_nearest_index(o, v) for o, v in zip(options, values)])
    ev = ChoiceEvaluator(fused, values.copy(), list(range(len(parts))), options)
    sizes = [len(o) for o in options]
    grid = np.array(list(itertools.product(*[range(n) for n in sizes])))
    brute = ev(grid)
    monkeypatch.setattr(search_module, "EXHAUSTIVE", 0)
    res = search_choices(ChoiceEvaluator(fused, values.copy(), list(range(len(parts))), options), base)
    assert not res.exhaustive
    assert res.cost == pytest.approx(float(brute.min()), rel=1e-12)


INVENTORY = """kind,value,count
# the drawer
C,4.7uF,1
C,10uF,2
C,3u3,1
C,6.8uF,1
C,22uF,1
C,2.2uF,3
C,1uF,2
L,0.33mH,1
L,0.56mH,1
L,0.47mH,2
L,1mH,1
L,0.22mH,1
L,0.15mH,1
L,0.68mH,1
L,1.5mH,1
R,8.2,1
"""


def test_inventory_counts_are_never_exceeded_and_combinations_are_reported(bw3_system, tmp_path):
    (tmp_path / "inv.csv").write_text(INVENTORY)
    inv = read_inventory(tmp_path / "inv.csv")
    assert dict(inv.parts["C"])[1e-5] == 2
    out = run_snap(bw3_system, bw3_system.values(), inventory=inv, combine=2)
    used: dict = {}
    for sp in out.parts:
        assert sp.source == "inventory"
        for key in sp.choice.uses:
            used[key] = used.get(key, 0) + 1
        if sp.choice.connection != "single":
            assert len(sp.choice.pieces) == 2
            total = sum(sp.choice.pieces)
            assert sp.value == pytest.approx(total, rel=1e-12)  # C parallel, L series add up
    stock = {(k, v): n for k, items in inv.parts.items() for v, n in items}
    for key, n in used.items():
        assert n <= stock[key], key
    assert any(sp.choice.connection != "single" for sp in out.parts)  # the drawer needs pairs here


@pytest.mark.parametrize("text, line, message", [
    ("C,4.7uF,1\nC,abc,2\n", 2, "cannot read 'abc'"),
    ("C,4.7uF,1\nL,1mH,x\n", 2, "count 'x' is not a whole number"),
    ("C,4.7uF,0\n", 1, "count must be at least 1"),
    ("C,4.7uF,1\nQ,1,1\n", 2, "expected a part kind R, L or C"),
    ("C,4.7uH\n", 1, "is not a value in F"),
    ("C,1uF,1,3\n", 1, "a C part has no dcr"),
    ("L,1mH,1,0.3,,2,9\n", 1, "expected kind, value [, count [, dcr"),
])
def test_bad_inventory_lines(tmp_path, text, line, message):
    p = tmp_path / "inv.csv"
    p.write_text(text)
    with pytest.raises(DataError, match=re.escape(message)) as e:
        read_inventory(p)
    assert e.value.line == line and e.value.path == str(p)


def test_snap_command_files_and_overrides(write_job, cli, tmp_path):
    text, _ = ladder_job("LR4", start=1.0, spread=3.0)
    job = write_job(text)
    code, out, err = cli("snap", job, "--out", tmp_path / "s", "--series", "E6")
    assert code == 0, err
    r = json.loads((tmp_path / "s" / "result.json").read_text())
    assert r["stage"] == "snap"
    assert all(p["series"] == "E6" for p in r["parts"].values())
    assert r["cost"] <= r["snap"]["log_nearest_cost"] + 1e-12
    import csv

    rows = list(csv.DictReader(open(tmp_path / "s" / "parts.csv")))
    assert list(rows[0]) == ["name", "kind", "value", "text", "source", "tolerance", "combination"]
    assert {row["source"] for row in rows} == {"E6"} and rows[0]["tolerance"] == "5%"
    assert "log-nearest rounding" in out and "change" in out
    (tmp_path / "inv.csv").write_text(INVENTORY)
    code, out, err = cli("snap", job, "--out", tmp_path / "i", "--inventory", tmp_path / "inv.csv", "--combine", "2",
                         "--no-plots")
    assert code == 0, err
    r = json.loads((tmp_path / "i" / "result.json").read_text())
    assert all(p.get("inventory") for p in r["parts"].values())
    code, _, err = cli("snap", job, "--out", tmp_path / "x", "--series", "E7")
    assert code == 2 and "unknown series 'E7'" in err
    code, _, err = cli("snap", job, "--out", tmp_path / "y", "--inventory", tmp_path / "missing.csv")
    assert code == 2 and "inventory file not found" in err


def test_snap_from_a_fit_and_continuous_parts(write_job, cli, tmp_path):
    """--from snaps a fit; a part with series "none" stays continuous and is re-optimised."""
    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    text = text.replace('name = "wL0"\ntype = "L"', 'name = "wL0"\ntype = "L"\nseries = "none"')
    job = write_job(text)
    assert cli("fit", job, "--out", tmp_path / "f", "--budget", "3000", "--no-plots")[0] == 0
    code, out, err = cli("snap", job, "--from", tmp_path / "f", "--out", tmp_path / "s", "--no-plots")
    assert code == 0, err
    r = json.loads((tmp_path / "s" / "result.json").read_text())
    assert r["parts"]["wL0"]["source"] == "continuous" and "series" not in r["parts"]["wL0"]
    assert r["parts"]["wC1"]["series"] == "E12"


def test_a_drawer_too_small_names_the_kind_and_counts(write_job, cli, tmp_path):
    """An LR2 two-way needs two coils and two capacitors; a drawer of one coil says which kind ran short."""
    text, _ = ladder_job("LR2", spread=3.0)
    (tmp_path / "inv.csv").write_text("L, 1.2mH, 1\nC, 4.7uF, 2\nC, 22uF, 2\n")
    code, _, err = cli("snap", write_job(text), "--out", tmp_path / "s", "--inventory", tmp_path / "inv.csv")
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "coils: 2 needed, 1 held" in err and "capacitors" not in err, err


def test_top_up_buys_from_a_series_what_the_drawer_lacks(write_job, cli, tmp_path):
    """The drawer that ran short above, topped up from E12: the coils it lacks are bought, its own parts used."""
    text, _ = ladder_job("LR2", spread=3.0)
    (tmp_path / "inv.csv").write_text("L, 1.2mH, 1\nC, 4.7uF, 2\nC, 22uF, 2\n")
    job = write_job(text)
    code, _, err = cli("snap", job, "--out", tmp_path / "s", "--inventory", tmp_path / "inv.csv", "--top-up", "E12",
                       "--no-plots")
    assert code == 0, err
    parts = json.loads((tmp_path / "s" / "result.json").read_text())["parts"]
    sources = [p["source"] for p in parts.values()]
    assert "E12" in sources and "inventory" in sources, sources
    coils = [p for p in parts.values() if p["unit"] == "H"]
    assert sum(p["source"] == "inventory" for p in coils) <= 1  # the drawer's one coil is used at most once
    code, _, err = cli("snap", job, "--out", tmp_path / "x", "--inventory", tmp_path / "inv.csv", "--top-up", "E7")
    assert code == 2 and "E7" in err
