"""The fused solve-and-cost kernel against the reference cost (numpy over the dense or compiled solve), to 1e-9."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.model.cost import TERMS
from xo_fit.model.fused import LEVEL, PREFERENCE
from xo_fit.demo import write_scenario
from xo_fit.search.fitting import cost_model
from xo_fit.model.fused import FusedCost
from xo_fit.job.reader import load_job
from xo_fit.search.space import make_space
from xo_fit.model.system import load_system

from conftest import ladder_job


def check(system, n=48, seed=0):
    cm, _ = cost_model(system)
    fused = FusedCost(cm)
    space = make_space(system.job)
    values = space.values(np.random.default_rng(seed).random((n, space.dims)))
    raw = fused.evaluate_raw(values)
    ev = cm.evaluate(values)
    np.testing.assert_allclose(raw[:, 0], ev.cost, rtol=1e-9)
    for i, t in enumerate(TERMS, start=1):
        np.testing.assert_allclose(raw[:, i], ev.terms.get(t, 0.0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(raw[:, LEVEL], ev.level_db, rtol=1e-12)
    if "preference" in ev.terms:
        np.testing.assert_allclose(raw[:, PREFERENCE], ev.terms["preference"], rtol=1e-9, atol=1e-12)
    else:
        assert raw.shape[1] == PREFERENCE
    return raw, ev


def test_fused_cost_on_the_demo(tmp_path):
    """The demo is an off-axis job fitted to its listening window."""
    raw, ev = check(load_system(load_job(write_scenario(tmp_path))))
    assert np.all(raw[:, 4] >= 0) and np.any(raw[:, 4] > 0)  # some random designs dip below the 3.2 ohm floor


@pytest.mark.parametrize("reference, er, sp", [("on_axis", 0.5, 0.0), ("listening_window", 0.0, 2.0),
                                               ("listening_window", 1.0, 1.0)])
def test_fused_cost_off_axis(tmp_path, reference, er, sp):
    """The off-axis terms (early reflections' and sound power's roughness, the listening window as the
    reference) in the kernel are the reference's numbers."""
    job = write_scenario(tmp_path)
    text = job.read_text().replace('reference = "listening_window"', f'reference = "{reference}"')
    job.write_text(text.replace("[cost]\n", f"[cost]\nearly_reflections = {er}\nsound_power = {sp}\n"))
    raw, ev = check(load_system(load_job(job)))
    for i, (t, w) in enumerate((("early_reflections", er), ("sound_power", sp)), start=6):
        assert TERMS[i - 1] == t
        assert (np.all(raw[:, i] > 0) if w else np.all(raw[:, i] == 0))


@pytest.mark.parametrize("name", ["LR2", "BW3"])
def test_fused_cost_with_a_fixed_level_and_a_floor(write_job, name):
    text, _ = ladder_job(name, start=1.0, spread=3.0, impedance_min=7.5)
    text = text.replace("band = [100, 15000]", "band = [100, 15000]\nlevel = 88.5")
    raw, _ = check(load_system(load_job(write_job(text))))
    assert np.all(raw[:, LEVEL] == 88.5)


def test_resonant_trap_and_flagged_candidates(write_job, monkeypatch):
    """An ideal series LC trap tuned onto a grid frequency (a branch of almost zero impedance there) is
    solved accurately by the kernel; and candidates the kernel flags are scored by the reference path
    (forced here by a pivot tolerance that every pivot fails)."""
    text, _ = ladder_job("LR2", start=1.0, spread=3.0)
    trap = """
[[part]]
name = "LT"
type = "L"
nodes = ["w0", "n2"]
value = 1e-3
[[part]]
name = "CT"
type = "C"
nodes = ["n2", "0"]
value = {c!r}
"""
    s0 = load_system(load_job(write_job(text)))
    f0 = s0.frequencies[120]
    c = float(1 / ((2 * np.pi * f0) ** 2 * 1e-3))
    s = load_system(load_job(write_job(text.replace("[target]", trap.format(c=c) + "\n[target]", 1))))
    check(s, n=8)
    import xo_fit.model.fused as fused_module

    cm, _ = cost_model(s)
    fused = FusedCost(cm)
    space = make_space(s.job)
    v = space.values(np.random.default_rng(3).random((5, space.dims)))
    calls = []
    real = cm.evaluate
    monkeypatch.setattr(cm, "evaluate", lambda x: calls.append(len(x)) or real(x))
    monkeypatch.setattr(fused_module, "PIVOT_TOLERANCE", 1e6)
    raw = fused.evaluate_raw(v)
    assert calls == [5]  # every candidate flagged and re-scored
    np.testing.assert_allclose(raw[:, 0], real(v).cost, rtol=1e-12)


def test_the_stress_term_in_the_fused_kernel_equals_the_reference(tmp_path):
    """[cost] stress: part currents from the generated elimination code against the dense solve's branch
    currents, the excess over each rating as cost.stress_excess_db defines it; rated R, C and L parts."""
    path = write_scenario(tmp_path)
    text = path.read_text().replace("[cost]", "[cost]\nstress = 1.0", 1)
    for name, unit in (("C3", "50V"), ("L3", "2A"), ("RZ", "5W")):  # a rating on a C, an L, another R
        marker = f'name = "{name}"\n'
        assert marker in text
        text = text.replace(marker, marker + f'rating = "{unit}"\n', 1)
    path.write_text(text)
    raw, ev = check(load_system(load_job(path)))
    assert np.any(raw[:, 5] > 0) and np.any(raw[:, 5] == 0)  # some random designs break a rating, some do not


@pytest.mark.parametrize("edit", [
    {},  # the demo: the listening window as reference, a band inside the preference's span
    {'reference = "listening_window"': 'reference = "on_axis"', "[cost]\n": "[cost]\nstress = 1.0\nsound_power = 0.5\n",
     "band = [150, 16000]": "band = [400, 6000]"},  # the solve's loop wider than the band: band sums masked
    {"f_min = 40": "f_min = 100"},  # the sound power not 6 dB down on the grid: LFX at its bound
])
def test_the_preference_term_in_the_fused_kernel_equals_the_reference(tmp_path, edit):
    """[cost] preference: Olive's score of every candidate, computed in the generated kernel (built in C where
    there is a compiler: its IR prints as C) as xo_fit.model.preference computes it, to
    1e-9 [CP: the reference implementation, itself checked against hand computations in test_preference]; the
    other terms unchanged by the wider frequency loop."""
    from xo_fit.model.acoustics import preference_of
    from xo_fit.solver import standalone

    job = write_scenario(tmp_path)
    text = job.read_text().replace("[cost]\n", "[cost]\npreference = 3.0\n", 1)
    for old, new in edit.items():
        assert old in text
        text = text.replace(old, new, 1)
    job.write_text(text)
    system = load_system(load_job(job))
    raw, ev = check(system)
    assert np.all(raw[:, PREFERENCE] > 0) and np.ptp(raw[:, PREFERENCE]) > 0.01
    cm, _ = cost_model(system)
    if standalone.enabled() and standalone.compiler():
        assert FusedCost(cm).kernel().uses_c  # the kernel check() ran: one text, one build
    if "f_min = 40" in edit:
        space = make_space(system.job)
        values = space.values(np.random.default_rng(0).random((48, space.dims)))
        lfx = preference_of(cm.preference_plan, cm.all_curves(system.simulate(values)), bound_lfx=False).lfx
        assert np.any(np.isnan(lfx))  # some candidates take the bound
