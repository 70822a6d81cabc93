"""The Python API and portable results: the docs' example runs, results rebuild from anywhere."""

from __future__ import annotations

import json
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

import xo_fit
from xo_fit.errors import XoFitError

from conftest import ladder_job

ROOT = Path(__file__).resolve().parents[1]


def test_the_api_example_in_the_docs_runs(tmp_path, monkeypatch, capsys):
    code = re.search(r"```python\n(.*?)```", (ROOT / "docs" / "api.md").read_text(encoding="utf-8"), re.S)[1]
    monkeypatch.chdir(tmp_path)
    exec(compile(code, "docs/api.md", "exec"), {})
    out = capsys.readouterr().out
    assert "fit cost" in out and "within +-1 dB" in out
    assert (tmp_path / "example" / "report" / "report.html").exists()
    assert (tmp_path / "example" / "fit" / "result.json").exists()


def test_values_by_part_name_and_errors_as_xofiterror(write_job):
    text, truth = ladder_job("LR2")
    job = xo_fit.load_job(write_job(text))
    hand = xo_fit.simulate(job)
    assert set(hand.values) == set(truth)
    assert all(hand.values[k] == pytest.approx(v, rel=1e-12) for k, v in truth.items())
    bumped = xo_fit.simulate(job, {"wL0": 2 * truth["wL0"]})
    assert bumped.values["wL0"] == pytest.approx(2 * truth["wL0"])
    assert bumped.cost > hand.cost
    assert list(hand.response.columns)[:3] == ["frequency_hz", "woofer_db", "woofer_deg"]
    with pytest.raises(XoFitError, match="no part named nope"):
        xo_fit.simulate(job, {"nope": 1.0})
    with pytest.raises(XoFitError, match="above 0"):
        xo_fit.simulate(job, {"wL0": -1.0})


def test_a_design_given_new_values_drops_what_it_worked_out_from_the_old(write_job):
    """Design caches its analysis (breakdown, findings' pieces, stresses); a new ``scored`` must not keep the
    old design's figures: LR2 at its handbook values is on target (breakdown ~0), 2x off it is not."""
    text, truth = ladder_job("LR2")
    job = xo_fit.load_job(write_job(text))
    hand = xo_fit.simulate(job)
    bumped = xo_fit.simulate(job, {"wL0": 2 * truth["wL0"]})
    before = hand.breakdown
    hand.scored = bumped.scored
    assert hand.breakdown == bumped.breakdown and hand.breakdown != before


def test_a_mapping_job_is_the_same_job_as_its_file(write_job, tmp_path):
    text, _ = ladder_job("LR2")
    path = write_job(text)
    from_file = xo_fit.load_job(path)
    from_map = xo_fit.load_job(from_file.data, base=tmp_path)
    assert from_map.parts == from_file.parts and from_map.grid == from_file.grid
    assert from_map.document == from_file.document
    a, b = xo_fit.simulate(from_file), xo_fit.simulate(from_map)
    assert a.cost == b.cost


def test_at_limit_only_within_one_percent_of_a_bound(write_job):
    text, truth = ladder_job("LR2", spread=2.0)
    job = xo_fit.load_job(write_job(text))
    lo = truth["wL0"] / 2
    on = xo_fit.simulate(job, {"wL0": lo * 1.009})   # 0.9 % inside: on the limit
    near = xo_fit.simulate(job, {"wL0": lo * 1.05})  # 5 % inside: not
    assert on.limits == {"wL0": "min"}
    assert near.limits == {}
    assert [f["kind"] for f in on.findings] == ["at_limit"]
    assert on.to_json()["parts"]["wL0"]["limit"] == "min"
    assert "limit" not in near.to_json()["parts"]["wL0"]


def _demo_fit(cli, tmp_path):
    from xo_fit.demo import write_scenario

    job = write_scenario(tmp_path / "tree" / "scenario")
    code, _, err = cli("fit", job, "--out", tmp_path / "tree" / "fit", "--budget", "1500", "--no-plots")
    assert code == 0, err
    return job


def test_result_provenance(cli, tmp_path):
    _demo_fit(cli, tmp_path)
    doc = json.loads((tmp_path / "tree" / "fit" / "result.json").read_text())
    assert doc["xo_fit_version"] == xo_fit.__version__ and doc["format"] == 2
    src = doc["source"]
    assert src["job_folder"] == os.path.join("..", "scenario")
    assert src["document"]["name"] == doc["job"] and "sweep" not in src["document"]


def test_a_moved_result_folder_reports_and_exports(cli, tmp_path):
    _demo_fit(cli, tmp_path)
    moved = tmp_path / "elsewhere" / "deep" / "fit"
    moved.parent.mkdir(parents=True)
    shutil.move(tmp_path / "tree" / "fit", moved)  # the data stays where it was: found by its absolute folder
    code, out, err = cli("report", moved, "--out", tmp_path / "r1")
    assert code == 0, err
    code, out, err = cli("export", moved, "--spice", tmp_path / "a.cir")
    assert code == 0, err
    # the whole tree moved (the old place gone): found relative to the result
    shutil.move(moved, tmp_path / "tree" / "fit")
    shutil.move(tmp_path / "tree", tmp_path / "tree2")
    code, out, err = cli("report", tmp_path / "tree2" / "fit", "--out", tmp_path / "r2")
    assert code == 0, err
    code, out, err = cli("export", tmp_path / "tree2" / "fit", "--spice", tmp_path / "b.cir")
    assert code == 0, err
    def circuit(p):  # the deck without its comment lines (they name the data files' paths) and its data file
        return [x for x in p.read_text().splitlines() if not x.startswith(("*", "wrdata"))]

    assert circuit(tmp_path / "a.cir") == circuit(tmp_path / "b.cir")
    # neither place has the data: one line naming both
    shutil.rmtree(tmp_path / "tree2" / "scenario")
    code, out, err = cli("export", tmp_path / "tree2" / "fit", "--spice", tmp_path / "c.cir")
    assert code == 2 and len(err.strip().splitlines()) == 1 and "looked for its data in" in err


def test_a_sweep_variant_reports_and_exports(cli, write_job, tmp_path):
    text, _ = ladder_job("LR2", spread=2.0, extra='[search]\nbudget = 600\n[sweep]\n"target.way.woofer.fc, '
                                                  'target.way.tweeter.fc" = [1800, 2200]\n')
    job = write_job(text)
    code, out, err = cli("batch", job, "--out", tmp_path / "b", "--stages", "fit", "--workers", "1", "--no-plots")
    assert code == 0, err
    results = sorted((tmp_path / "b").glob("*/fit/result.json"))
    assert len(results) == 2
    for r in results:
        doc = json.loads(r.read_text())
        fc = doc["source"]["document"]["target"]["way"]["woofer"]["fc"]
        assert fc in (1800, 2200) and doc["job"].endswith(f"fc{fc}")
        code, out, err = cli("report", r, "--out", r.parent / "report")
        assert code == 0, err
        code, out, err = cli("export", r, "--spice", r.parent / "deck.cir")
        assert code == 0, err
        d = xo_fit.load_result(r)
        assert d.cost == pytest.approx(doc["cost"], rel=1e-9)
        assert d.job.target.ways[0].fc == fc


def test_report_takes_designs_and_a_result_rebuilds_the_same_design(write_job, tmp_path):
    text, truth = ladder_job("LR2", spread=2.0, start=1.2)
    job = xo_fit.load_job(write_job(text))
    best = xo_fit.fit(job, budget=1500, seed=3)
    best.save(tmp_path / "fit", plots=False)
    again = xo_fit.load_result(tmp_path / "fit")
    assert again.cost == pytest.approx(best.cost, rel=1e-12)
    assert np.allclose(again.array, best.array, rtol=1e-15)
    page = xo_fit.write_report([best, again], tmp_path / "report")
    html = page.read_text()
    assert "fit 1" in html and "fit 2" in html


def test_phase_edge_appears_and_disappears_as_the_band_moves(write_job, tmp_path):
    """A tweeter file from 300 Hz to 30 kHz with its phase derived: a band reaching below 600 Hz (an octave above
    the file's start) or above 15 kHz gets the finding; a band inside them does not."""
    f = np.geomspace(300, 30000, 120)
    curve = "".join(f"{x:.3f} 90.0\n" for x in f)
    text, _ = ladder_job("LR2")
    text = text.replace('[driver.tweeter]\nresponse = 90', '[driver.tweeter]\nresponse = "t.txt"\nphase = "minimum"')
    text = text.replace("f_min = 20", "f_min = 310").replace("f_max = 20000", "f_max = 29000")
    kinds = {}
    for band in ("[400, 12000]", "[700, 12000]", "[700, 16000]"):
        job = xo_fit.load_job(write_job(text.replace("band = [100, 15000]", f"band = {band}"), {"t.txt": curve}))
        kinds[band] = [x["kind"] for x in xo_fit.simulate(job).findings]
    assert "phase_edge" in kinds["[400, 12000]"] and "phase_edge" in kinds["[700, 16000]"]
    assert "phase_edge" not in kinds["[700, 12000]"]
