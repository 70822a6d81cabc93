"""The designer's report, stresses, cautions and the SPICE export, against outside references."""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import numpy as np
import pytest

from xo_fit.output.cautions import design_cautions
from xo_fit.job.reader import load_job
from xo_fit.output.spice import netlist
from xo_fit.model.stress import epdr, stresses
from xo_fit.model.system import load_system

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

LPAD = '''
name = "lpad"
[grid]
f_min = 100
f_max = 10000
points = 41
[source]
voltage = 2.83
[driver.t]
response = 90
impedance = 8
[[part]]
name = "R1"
type = "R"
nodes = ["in", "a"]
value = 3.9905
rating = "5W"
[[part]]
name = "R2"
type = "R"
nodes = ["a", "0"]
value = 8.0381
[[part]]
name = "T"
type = "driver"
driver = "t"
nodes = ["a", "0"]
[target.way.t]
type = "fullrange"
[stress]
power = 100
rated_impedance = 8
'''


def test_lpad_stresses_follow_ohms_law(write_job):
    """An L-pad (6 dB into 8 ohm, docs/references.md) on a resistive load: at 100 W into 8 ohm (28.28 V RMS) the input is
    exactly 8 ohm, so 3.536 A flows in R1 (P = I^2 R1) and the pad's node sits at V/2 (P2 = (V/2)^2 / R2)."""
    s = load_system(load_job(write_job(LPAD)))
    st = stresses(s, s.values(), 100.0, 8.0)
    v = np.sqrt(100 * 8)
    i = v / 8.0
    p = {x.name: x for x in st.parts}
    k = 10 ** (-6 / 20)
    assert p["R1"].sine_worst == pytest.approx(i**2 * 3.9905, rel=1e-3)
    assert p["R2"].sine_worst == pytest.approx((v * k) ** 2 / 8.0381, rel=1e-3)
    assert p["R1"].programme == pytest.approx(p["R1"].sine_worst, rel=1e-9)  # flat network: same at every frequency
    assert st.epdr_min_ohm == pytest.approx(8.0, rel=1e-6)  # resistive: EPDR = |Z|
    c = design_cautions(st, 8.0)
    # 3.9905 / 8 x 100 W = 49.88 W in R1; programme = sine here; 2x that is the advice
    assert any("R1 is rated 5 W" in x and "49.9 W programme" in x and "use at least 99.8 W" in x for x in c), c
    assert any("wadding" in x for x in c) and any("licensed practice" in x for x in c)


def test_epdr_and_the_80_percent_rule():
    """EPDR (K. Howard 2006, docs/references.md): EPDR/|Z| = 1 at 0 deg and 0.35 at 45 deg.
    IEC 60268-5: the minimum |Z| should not fall below 80 % of the rated impedance: 4 ohm -> 3.2 ohm."""
    assert epdr(np.array([8.0 + 0j]))[0] == pytest.approx(8.0)
    assert epdr(np.array([np.exp(1j * np.pi / 4)]))[0] == pytest.approx(0.35, abs=0.005)
    assert epdr(np.array([np.exp(-1j * np.pi / 4)]))[0] == pytest.approx(0.3536, abs=1e-4)
    from xo_fit.output.cautions import LOW_LOAD_OHM, RATED_FRACTION

    assert RATED_FRACTION * 4 == pytest.approx(3.2) and LOW_LOAD_OHM == pytest.approx(3.2)


def _ngspice() -> str:
    """The ngspice program; the test is skipped without it, unless XO_FIT_REQUIRE_NGSPICE=1 (CI) makes it a failure."""
    ngspice = shutil.which("ngspice")
    if ngspice is None:
        if os.environ.get("XO_FIT_REQUIRE_NGSPICE") == "1":
            raise RuntimeError("ngspice is required (XO_FIT_REQUIRE_NGSPICE=1)")
        pytest.skip("ngspice not installed")
    return ngspice


def _run_deck(ngspice: str, deck: str, folder, name: str = "x") -> np.ndarray:
    """Run ``deck`` as exported (its own control block) in ngspice batch mode; the columns of the data file it
    writes: frequency, then re, im of each driver voltage and of the input current."""
    (folder / f"{name}.cir").write_text(deck)
    run = subprocess.run([ngspice, "-b", f"{name}.cir"], cwd=folder, capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stdout + run.stderr
    assert "db(" in run.stdout and "Error" not in run.stdout + run.stderr  # it printed its results too
    data_file = re.search(r"^wrdata (\S+)", deck, re.M)[1]
    return np.loadtxt(folder / data_file, skiprows=1)


def test_exported_netlist_runs_in_ngspice(write_job, tmp_path):
    """The exported deck (Thiele-Small drivers as their RLC equivalents), run through ngspice, gives xo_fit's
    driver voltages."""
    ngspice = _ngspice()
    text = '''
[grid]
f_min = 20
f_max = 20000
points = 61
[source]
voltage = 2.83
resistance = 0.05
[driver.w]
response = 88
impedance = { re = 5.4, le = "0.6mH", fs = 58, qms = 3.4, qes = 0.62 }
[driver.t]
response = 91
impedance = { re = 4.7, le = "0.06mH", fs = 780, qms = 1.6, qes = 1.3 }
[[part]]
name = "L1"
type = "L"
nodes = ["in", "w1"]
value = "0.8mH"
dcr = "18awg"
[[part]]
name = "C1"
type = "C"
nodes = ["w1", "0"]
value = "12uF"
esr = 0.03
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["w1", "0"]
[[part]]
name = "C2"
type = "C"
nodes = ["in", "t1"]
value = "6.8uF"
[[part]]
name = "L2"
type = "L"
nodes = ["t1", "0"]
value = "0.33mH"
dcr = 0.25
[[part]]
name = "T"
type = "driver"
driver = "t"
nodes = ["0", "t1"]
'''
    s = load_system(load_job(write_job(text)))
    deck = netlist(s, s.values(), "test")
    assert "PLACEHOLDER" not in deck and ".subckt DRV_w" in deck
    data = _run_deck(ngspice, deck, tmp_path)
    f = data[:, 0]
    np.testing.assert_allclose(f, s.frequencies, rtol=1e-9)
    spice = data[:, 1::2] + 1j * data[:, 2::2]
    sol = s.network.solve(s.values())
    mine = sol.voltages[0]
    np.testing.assert_allclose(mine[0], spice[:, 0], rtol=1e-6)
    np.testing.assert_allclose(mine[1], spice[:, 1], rtol=1e-6)
    # the input current: the source's voltage over the input impedance and its own resistance
    np.testing.assert_allclose(2.83 / (sol.impedance[0] + 0.05), spice[:, 2], rtol=1e-6)


@pytest.mark.slow
def test_measured_drivers_export_as_fitted_circuits_that_ngspice_agrees_with(tmp_path, cli, demo_run):
    """The demo's drivers are measured: the deck models each by the lossy-coil circuit fitted to its impedance,
    states the fit error, and run through ngspice (its own control block) gives xo_fit's driver voltages within
    that error (rms over the grid), and the input current within the largest error stated."""
    ngspice = _ngspice()
    demo, _ = demo_run
    code, out, err = cli("export", demo / "snap", "--spice", tmp_path / "x.cir")
    assert code == 0, err
    deck = (tmp_path / "x.cir").read_text()
    assert "PLACEHOLDER" not in deck and "ngspice -b x.cir" in out and "x.data" in out
    assert re.search(r"^LLN ", deck, re.M) and re.search(r"^RL1_dcr ", deck, re.M)
    stated = [(float(a), float(b)) for a, b in re.findall(r"^\* fit error ([\d.]+) % rms of \|Z\|, at most ([\d.]+) %",
                                                         deck, re.M)]
    assert len(stated) == 2 and "fit error" in out
    data = _run_deck(ngspice, deck, tmp_path, "x")
    from xo_fit.output.loading import load_result

    d = load_result(demo / "snap")
    s = d.system
    sol = s.network.solve(d.array)
    np.testing.assert_allclose(data[:, 0], s.frequencies, rtol=1e-9)
    spice = data[:, 1::2] + 1j * data[:, 2::2]
    for k, (rms, _) in enumerate(stated):
        mine = sol.voltages[0, k]
        e = np.abs(spice[:, k] - mine) / np.abs(mine)
        assert 100 * np.sqrt(np.mean(e ** 2)) <= rms, k
    current = s.job.source_voltage / (sol.impedance[0] + s.job.source_resistance)
    assert 100 * np.max(np.abs(spice[:, 2] - current) / np.abs(current)) <= max(m for _, m in stated)


def test_a_measured_driver_without_a_model_stays_a_marked_placeholder(write_job, tmp_path, cli):
    """An impedance file with no resonance on the grid (a flat 7 ohm): no model fits, so the deck keeps a marked
    resistor and says why; the deck still runs."""
    flat = "".join(f"{f:g} 7.0 0\n" for f in np.geomspace(10, 40000, 60))
    job = write_job("""
[grid]
f_min = 20
f_max = 20000
points = 41
[driver.t]
response = 90
impedance = "z.txt"
[[part]]
name = "C1"
type = "C"
nodes = ["in", "t1"]
value = "10uF"
[[part]]
name = "T"
type = "driver"
driver = "t"
nodes = ["t1", "0"]
""", {"z.txt": flat})
    code, _, err = cli("simulate", job, "--out", tmp_path / "sim", "--no-plots")
    assert code == 0, err
    code, out, err = cli("export", tmp_path / "sim", "--spice", tmp_path / "p.cir")
    assert code == 0, err
    deck = (tmp_path / "p.cir").read_text()
    assert deck.count("PLACEHOLDER") == 1 and "no resonance peak" in deck and "PLACEHOLDER" in out
    assert float(re.search(r"^RD pos neg (\S+)$", deck, re.M)[1]) == pytest.approx(7.0)
    data = _run_deck(_ngspice(), deck, tmp_path, "p")
    w = 2 * np.pi * data[:, 0]
    # a first-order high-pass into 7 ohm: V = Vs * R / (R + 1/(j w C))  (circuit theory)
    np.testing.assert_allclose(data[:, 1] + 1j * data[:, 2], 2.83 * 7 / (7 + 1 / (1j * w * 10e-6)), rtol=1e-6)


@pytest.mark.slow
def test_report_is_self_contained_and_renders_in_a_real_browser(tmp_path, demo_run):
    demo, run = demo_run
    assert "report: " in run.stdout
    page = (demo / "report" / "report.html").read_text()
    # nothing outside itself: no links, scripts or remote images; every image inline
    assert not re.search(r"(href|src)\s*=\s*[\"'](?!data:)", page)
    assert "http://" not in page and "https://" not in page
    assert page.count('src="data:image/png;base64,') >= 5
    # the demo is an off-axis job: its directivity curves and the colour maps of each orbit
    assert 'alt="directivity"' in page and 'alt="angles"' in page and "sound power DI runs from" in page
    for text in ("Metrics", "Part list", "Cautions", "EPDR", "Stresses at 60 W into 4 Ω", "R1", "rated 10 W",
                 "licensed practice", "xo_fit 0.", "from: xo-fit", "(at its min)", "Where the error lies"):
        assert text in page, text
    # the spread's part list still says what to buy (it once said "continuous" for every snapped part)
    part_list = page.split("<h2>Part list", 1)[1].split("</table>", 1)[0]
    assert "E12" in part_list and "E24" in part_list and "continuous" not in part_list
    # what to buy comes first, from the snap (the last one given), and is in bom.csv beside the page
    assert re.findall(r"<h2>([^<]+)", page)[0] == "What to buy" and "(the last snap given)" in page
    assert (demo / "report" / "bom.csv").read_text() == (demo / "snap" / "bom.csv").read_text()
    if CHROMIUM is None:
        if os.environ.get("XO_FIT_REQUIRE_CHROMIUM") == "1":
            raise RuntimeError("chromium is required (XO_FIT_REQUIRE_CHROMIUM=1)")
        pytest.skip("chromium not installed")
    shot = tmp_path / "shot.png"
    run = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                          "--disable-background-networking", "--disable-component-update", "--disable-sync",
                          f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1200,2400",
                          f"--screenshot={shot}", (demo / "report" / "report.html").as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert shot.exists(), run.stderr
    import matplotlib.image as mpimg

    img = mpimg.imread(shot)
    assert img.shape[0] >= 2000
    # plots: many distinct colours and a good share of non-white pixels (a blank page is all white)
    rgb = (img[..., :3] * 255).astype(int)
    nonwhite = np.mean(np.any(rgb < 235, axis=-1))
    colours = len(np.unique(rgb.reshape(-1, 3)[::37], axis=0))
    assert nonwhite > 0.05 and colours > 200, (nonwhite, colours)
    # the page as the browser built it has every section a designer reads
    dom = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                          "--disable-background-networking", "--disable-component-update", "--disable-sync",
                          f"--user-data-dir={tmp_path / 'profile2'}", "--dump-dom",
                          (demo / "report" / "report.html").as_uri()],
                         capture_output=True, text=True, timeout=120).stdout
    heads = re.findall(r"<h2>([^<(]+)", dom)
    for want in ("What to buy", "Metrics", "Where the error lies", "Tolerance", "Values", "Targets", "Curves",
                 "Part list", "Network", "Findings", "Cautions"):
        assert any(h.strip() == want for h in heads), (want, heads)


def test_report_refuses_to_overlay_different_grids(write_job, cli, tmp_path):
    from conftest import ladder_job

    a, _ = ladder_job("LR2")
    b = a.replace("points = 241", "points = 120")
    assert cli("simulate", write_job(a, name="a.toml"), "--out", tmp_path / "ra", )[0] == 0
    assert cli("simulate", write_job(b, name="b.toml"), "--out", tmp_path / "rb")[0] == 0
    code, _, err = cli("report", tmp_path / "ra", tmp_path / "rb", "--out", tmp_path / "rep")
    assert code == 2 and "need the same grid and drivers" in err and len(err.strip().splitlines()) == 1
    code, out, err = cli("report", tmp_path / "ra", "--out", tmp_path / "rep1")
    assert code == 0 and (tmp_path / "rep1" / "report.html").exists(), err


def test_hostile_text_cannot_reach_the_deck_as_statements(write_job, tmp_path, cli):
    """Text from a result (its stage, here edited by hand to hold newlines and a control block) stays inside one
    comment line of the deck; ngspice runs nothing of it. Job names with line breaks are refused outright."""
    import json

    from conftest import ladder_job

    text, _ = ladder_job("LR2")
    hostile = 'x\n.control\nshell touch PWNED\n.endc\r\nRX in 0 1'
    code, out, err = cli("check", write_job(f'name = {json.dumps(hostile)}\n' + text, name="bad.toml"))
    assert code == 2 and "cannot name files and folders" in err and len(err.strip().splitlines()) == 1
    job = write_job(text)
    code, out, err = cli("simulate", job, "--out", tmp_path / "sim", "--no-plots")
    assert code == 0, err
    doc = json.loads((tmp_path / "sim" / "result.json").read_text())
    doc["stage"] = hostile
    (tmp_path / "sim" / "result.json").write_text(json.dumps(doc))
    # a stage that is no printable text is refused where the result is read: one line naming file and key
    code, out, err = cli("export", tmp_path / "sim", "--spice", tmp_path / "deck.cir")
    assert code == 2 and "stage" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "deck.cir").exists()
    # ... and hostile text in a printable stage stays inside one comment line of the deck
    doc["stage"] = ".control shell touch PWNED .endc RX in 0 1"
    (tmp_path / "sim" / "result.json").write_text(json.dumps(doc))
    code, out, err = cli("export", tmp_path / "sim", "--spice", tmp_path / "deck.cir")
    assert code == 0, err
    deck = (tmp_path / "deck.cir").read_text()
    statements = [x for x in deck.splitlines() if x.strip() and not x.startswith("*")]
    assert not any(x.lower().startswith(("shell", "rx ")) for x in statements), statements
    # one control block, the deck's own (run, write, print, quit), and nothing of the hostile text in it
    assert [x.lower() for x in statements].count(".control") == 1 and "touch" not in " ".join(statements)
    assert "shell touch PWNED" in deck.splitlines()[0]  # kept, as a comment
    ngspice = _ngspice()
    subprocess.run([ngspice, "-b", str(tmp_path / "deck.cir")], cwd=tmp_path, capture_output=True, timeout=60)
    assert not (tmp_path / "PWNED").exists()


def test_nodes_that_differ_only_in_case_stay_apart_in_the_deck(write_job, tmp_path):
    """SPICE reads names without regard to case: "w1" and "W1" would merge and the coil between them vanish.
    The deck renames one, and ngspice then gives xo_fit's driver voltage (to 1e-6)."""
    from xo_fit.output.spice import spice_names

    text = """
[grid]
f_min = 20
f_max = 20000
points = 31
[driver.w]
response = 88
impedance = 8
[[part]]
name = "L1"
type = "L"
nodes = ["in", "w1"]
value = "1mH"
[[part]]
name = "l1"
type = "L"
nodes = ["w1", "W1"]
value = "2mH"
[[part]]
name = "C1"
type = "C"
nodes = ["W1", "0"]
value = "10uF"
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["W1", "0"]
"""
    s = load_system(load_job(write_job(text)))
    deck = netlist(s, s.values(), "case")
    node = spice_names(["in", "0", "w1", "W1"], keep=("0", "in"))
    assert node["w1"].lower() != node["W1"].lower()
    elements = [x.split()[0].lower() for x in deck.splitlines() if x and x[0] in "RLCX"]
    assert len(elements) == len(set(elements)) == 5  # L1, l1, C1, the driver and RD inside its subcircuit
    ngspice = _ngspice()
    assert re.search(rf"^wrdata \S+ v\({node['W1']}\) i\(vin\)$", deck, re.M)
    data = _run_deck(ngspice, deck, tmp_path)
    mine = s.network.solve(s.values()).voltages[0, 0]
    np.testing.assert_allclose(mine, data[:, 1] + 1j * data[:, 2], rtol=1e-6)


def test_the_network_is_drawn_as_ladders_or_listed(write_job, tmp_path):
    """The demo's two ways lay out as ladders (every part placed once); a bridge between the ways has no ladder
    layout, and the report then lists the netlist instead."""
    import xo_fit
    from xo_fit.demo import write_scenario
    from xo_fit.output.schematic import draw, ladders

    job = xo_fit.load_job(write_scenario(tmp_path / "s"))
    lay = ladders(job)
    placed = [n for w in lay for n, _, _ in w["series"]] + [n for w in lay for c in w["shunts"].values() for x in c
                                                            for n in x]
    assert sorted(placed) == sorted(p.name for p in job.valued_parts)
    assert draw(job, xo_fit.simulate(job).values)[:4] == b"\x89PNG"
    from conftest import ladder_job

    text, _ = ladder_job("LR2")
    head, tail = text.split("[target]", 1)
    bridged = write_job(head + '[[part]]\nname = "RB"\ntype = "R"\nnodes = ["w0", "t0"]\nvalue = 100\n[target]' + tail)
    job2 = xo_fit.load_job(bridged)
    assert ladders(job2) is None
    page = xo_fit.write_report([xo_fit.simulate(job2)], tmp_path / "r").read_text()
    assert "<th>from node</th>" in page and "RB" in page
