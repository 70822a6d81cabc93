"""The command line as a user runs it: check, simulate, demo; exit codes; files written."""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest

from conftest import flat_curve, resistive_curve

JOB = '''\
name = "tiny"
[grid]
f_min = 50
f_max = 15000
points = 60
[source]
voltage = 2.83
resistance = 0.1
[driver.woofer]
response = "w.txt"
impedance = "wz.txt"
offset = "20mm"
[driver.tweeter]
response = 88
impedance = { re = 4.8, le = "0.05mH", fs = 900, qms = 2, qes = 1.2 }
[[part]]
name = "L1"
type = "L"
nodes = ["in", "w"]
value = "1mH"
min = "0.2mH"
max = "3mH"
dcr = "18awg"
[[part]]
name = "W"
type = "driver"
driver = "woofer"
nodes = ["w", "0"]
[[part]]
name = "C1"
type = "C"
nodes = ["in", "t"]
value = "6u8"
esr = 0.05
[[part]]
name = "T"
type = "driver"
driver = "tweeter"
nodes = ["0", "t"]
[target]
band = [100, 10000]
[cost]
impedance_min = 3.2
'''
FILES = {"w.txt": flat_curve(level=87), "wz.txt": resistive_curve(6.0)}


def test_check_prints_what_a_designer_needs(write_job, cli):
    code, out, err = cli("check", write_job(JOB, FILES))
    assert code == 0, err
    for text in ("60 points", "50 Hz to 15 kHz", "w.txt", "phase measured", "Thiele-Small model: Re", "L1", "free",
                 "C1", "fixed", "esr 50 mΩ", "dcr from 1.024 mm wire", "free     1: L1", "nodes    4: in, 0, t, w"):
        assert text in out, (text, out)


def test_simulate_writes_contract_files(write_job, cli, tmp_path):
    out_dir = tmp_path / "out"
    code, out, err = cli("simulate", write_job(JOB, FILES), "--out", out_dir)
    assert code == 0, err
    result = json.loads((out_dir / "result.json").read_text())
    assert result["job"] == "tiny" and result["stage"] == "simulate"
    assert result["parts"]["L1"] == {"value": 1e-3, "unit": "H", "text": "1 mH"}
    assert result["parts"]["C1"]["value"] == pytest.approx(6.8e-6)
    m = result["metrics"]
    assert 100 <= m["impedance_min_hz"] <= 10000 and m["impedance_min_ohm"] > 0
    table = pd.read_csv(out_dir / "response.csv")
    assert list(table.columns) == ["frequency_hz", "woofer_db", "woofer_deg", "tweeter_db", "tweeter_deg",
                                   "sum_db", "sum_deg", "target_db", "impedance_ohm", "impedance_deg"]
    assert len(table) == 60
    zmin = table.impedance_ohm[(table.frequency_hz >= 100) & (table.frequency_hz <= 10000)].min()
    assert zmin == pytest.approx(m["impedance_min_ohm"], rel=1e-5)
    assert (out_dir / "response.png").stat().st_size > 10000
    assert not [p for p in out_dir.iterdir() if p.name.startswith(".")]  # no temporaries left


def test_simulate_from_a_result(write_job, cli, tmp_path):
    job = write_job(JOB, FILES)
    cli("simulate", job, "--out", tmp_path / "a")
    data = json.loads((tmp_path / "a" / "result.json").read_text())
    data["parts"]["L1"]["value"] = 2e-3
    (tmp_path / "r.json").write_text(json.dumps(data))
    code, _, err = cli("simulate", job, "--from", tmp_path / "r.json", "--out", tmp_path / "b")
    assert code == 0, err
    b = json.loads((tmp_path / "b" / "result.json").read_text())
    assert b["parts"]["L1"]["value"] == 2e-3
    ta = pd.read_csv(tmp_path / "a" / "response.csv")
    tb = pd.read_csv(tmp_path / "b" / "response.csv")
    assert not np.allclose(ta.woofer_db, tb.woofer_db)


@pytest.mark.parametrize("edit, message", [
    (lambda d: d["parts"].update({"LX": {"value": 1.0}}), "names part LX, which the job does not have"),
    (lambda d: d["parts"]["L1"].update({"value": -1}), "part L1: expected"),
    (lambda d: d.pop("parts"), "not an xo_fit result"),
])
def test_bad_result_files(write_job, cli, tmp_path, edit, message):
    job = write_job(JOB, FILES)
    cli("simulate", job, "--out", tmp_path / "a")
    data = json.loads((tmp_path / "a" / "result.json").read_text())
    edit(data)
    (tmp_path / "r.json").write_text(json.dumps(data))
    code, _, err = cli("simulate", job, "--from", tmp_path / "r.json", "--out", tmp_path / "b")
    assert code == 2 and message in err and len(err.strip().splitlines()) == 1, err


def test_bad_measurement_file_through_the_cli(write_job, cli, tmp_path):
    files = dict(FILES, **{"w.txt": "Freq dB\n100 85\n200 86\n150 87\n"})
    code, _, err = cli("check", write_job(JOB, files))
    assert code == 2
    assert err.strip() == f"xo-fit: error: {tmp_path / 'w.txt'}:4: frequencies must rise strictly: 150 Hz follows 200 Hz"


def test_grid_beyond_data_through_the_cli(write_job, cli, tmp_path):
    files = dict(FILES, **{"wz.txt": resistive_curve(6.0, f_lo=100.0)})
    code, _, err = cli("check", write_job(JOB, files))
    assert code == 2
    assert f"{tmp_path / 'wz.txt'}: impedance covers 100-40000 Hz but the job's grid spans 50-15000 Hz" in err


def test_free_part_without_value_cannot_be_simulated(write_job, cli, tmp_path):
    job = write_job(JOB.replace('value = "1mH"\n', ""), FILES)
    code, _, err = cli("simulate", job, "--out", tmp_path / "o")
    assert code == 2 and "part L1 has only a range" in err


def test_usage_errors_exit_2(cli):
    code, _, _ = cli("simulate")
    assert code == 2
    code, _, _ = cli("no-such-command")
    assert code == 2


@pytest.mark.slow
def test_demo_end_to_end(demo_run):
    """The README's main command, as a subprocess: the console script's module form."""
    demo, run = demo_run
    tmp_path = demo.parent
    assert (tmp_path / "demo" / "scenario" / "job.toml").exists()
    assert (tmp_path / "demo" / "hand-design" / "response.png").exists()
    result = json.loads((tmp_path / "demo" / "hand-design" / "result.json").read_text())
    assert len(result["parts"]) == 13
    # the textbook hand design misses a flat sum by several dB: the problem the fit is for
    t = pd.read_csv(tmp_path / "demo" / "hand-design" / "response.csv")
    band = (t.frequency_hz > 150) & (t.frequency_hz < 16000)
    assert t.sum_db[band].max() - t.sum_db[band].min() > 3.5
    assert result["metrics"]["max_error_db"] > 3.5
    # ... and the fit brings it within about a dB
    fit = json.loads((tmp_path / "demo" / "fit" / "result.json").read_text())
    assert fit["stage"] == "fit" and fit["search"]["complete"]
    assert fit["metrics"]["rms_error_db"] < 0.6 and fit["metrics"]["max_error_db"] < 1.5
    assert fit["cost"] < 0.1 * result["cost"]
    assert fit["metrics"]["impedance_min_ohm"] >= 3.2
    # ... and the snap to E12/E24 keeps most of the gain
    snapped = json.loads((tmp_path / "demo" / "snap" / "result.json").read_text())
    assert snapped["stage"] == "snap" and snapped["cost"] <= snapped["snap"]["log_nearest_cost"]
    assert snapped["metrics"]["max_error_db"] < 2.0
    assert {p["series"] for p in snapped["parts"].values()} == {"E12", "E24"}
    # ... and with 5 % parts nearly every build stays within a dB of it
    spread = json.loads((tmp_path / "demo" / "spread" / "result.json").read_text())
    assert spread["spread"]["yield"]["within_band"] > 0.9
    assert (tmp_path / "demo" / "spread" / "spread.png").exists()


from test_measure import test_malformed_lines as _cases  # noqa: E402

MALFORMED = [m.args for m in _cases.pytestmark if m.name == "parametrize"][0][1]


@pytest.mark.parametrize("text, line, message", MALFORMED)
def test_malformed_measurement_files_through_the_cli(write_job, cli, tmp_path, text, line, message):
    code, out, err = cli("check", write_job(JOB, dict(FILES, **{"w.txt": text})))
    assert code == 2, (out, err)
    assert len(err.strip().splitlines()) == 1, err
    assert err.startswith(f"xo-fit: error: {tmp_path / 'w.txt'}:{line}: "), err
    assert re.search(message, err), err


def test_check_shows_the_targets(write_job, cli):
    from conftest import ladder_job

    text, _ = ladder_job("LR2")
    code, out, err = cli("check", write_job(text))
    assert code == 0, err
    assert "target   band 100 Hz to 15 kHz" in out
    assert "woofer     lowpass LR2 at 2 kHz, normal polarity" in out
    assert "tweeter    highpass LR2 at 2 kHz, inverted polarity" in out


def test_verbose_shows_loading_and_convergence(write_job, cli, tmp_path):
    from conftest import ladder_job

    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    code, out, err = cli("-v", "fit", write_job(text), "--out", tmp_path / "o", "--budget", "2000", "--no-plots")
    assert code == 0, err
    assert "compiled kernels are cached in" in out and "convergence (evaluations: best cost):" in out
    code, out, _ = cli("-q", "fit", write_job(text), "--out", tmp_path / "q", "--budget", "2000", "--no-plots")
    assert code == 0 and out == ""


def test_check_validates_every_sweep_variant(write_job, cli):
    from conftest import ladder_job

    text, _ = ladder_job("LR2", start=2.0, spread=4.0)
    good = write_job(text + '\n[sweep]\n"target.way.woofer.fc, target.way.tweeter.fc" = [1800, 2400]\n', name="s.toml")
    code, out, err = cli("check", good)
    assert code == 0, err
    assert "2 variants, all valid" in out and "s-fc1800" in out and "s-fc2400" in out
    bad = write_job(text + '\n[sweep]\n"target.way.woofer.fcc" = [1800]\n', name="b.toml")
    code, _, err = cli("check", bad)
    assert code == 2 and "unknown key 'fcc'" in err
    code, _, err = cli("fit", good, "--out", "x")
    assert code == 2 and "[sweep] of variants" in err


def test_version(cli):
    from xo_fit import __version__

    code, out, _ = cli("--version")
    assert code == 0 and out.strip() == f"xo-fit {__version__}"


def test_help_shows_every_default_as_a_value(cli):
    """Rich markup once ate "[search]" from the help, leaving "(default: budget)"; the demo's help names all it does."""
    code, out, _ = cli("fit", "--help")
    assert code == 0
    text = " ".join(out.split()).replace("│", "").replace("  ", " ")
    assert "[search] budget, else 20000" in " ".join(text.split())
    code, out, _ = cli("demo", "--help")
    flat = " ".join(out.split())
    assert "spread" in flat and "report" in flat


def test_spread_says_when_the_nominal_design_already_misses_the_limits(tmp_path):
    from xo_fit.cli.app import main as run_main
    from xo_fit.demo import write_scenario
    import contextlib
    import io

    job = write_scenario(tmp_path / "s")  # its hand design is 3 dB rms off the target
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert run_main(["spread", str(job), "--out", str(tmp_path / "sp"), "--samples", "100", "--no-plots"]) == 0
    assert "the nominal design itself misses the limits: its rms error is" in out.getvalue()


def test_common_options_go_before_or_after_the_command(write_job, cli, tmp_path):
    """`xo-fit check JOB --quiet` works as `xo-fit --quiet check JOB` (the command-line contract): it once failed
    with "no such option"."""
    from conftest import ladder_job

    job = write_job(ladder_job("LR2")[0])
    code, out, err = cli("check", job, "--quiet")
    assert code == 0, err
    assert out == ""
    code, loud, err = cli("check", job)
    assert code == 0 and "ok" in loud
    code, out, err = cli("check", job, "-v")
    assert code == 0 and "loaded" in out
