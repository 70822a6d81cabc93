"""The report page as a designer reads it: what to buy (--buy, bom.csv), each result under its own name and
targets, curves that do not hide each other, labelled reference lines, the tolerance summary, escaped text
from result files, no empty legend. The contract: docs/outputs.md (report.html, bom.csv) and docs/api.md."""

from __future__ import annotations

import csv
import json
import re

import numpy as np
import pytest

import xo_fit
from conftest import flat_curve, ladder_job

STRESS = "[stress]\npower = 50\nrated_impedance = 8\n"
#: matplotlib's "No artists with labels" (an empty legend box) must never reach the user: an error in every test here.
pytestmark = pytest.mark.filterwarnings("error:No artists with labels:UserWarning")


@pytest.fixture
def designs(write_job, tmp_path):
    """A fit of an LR2 two-way and two snaps of it (E6 coils and capacitors, then E24), saved as results."""
    text, _ = ladder_job("LR2", spread=2.0, start=1.3, impedance_min=6.4, extra=STRESS)
    job = xo_fit.load_job(write_job(text))
    best = xo_fit.fit(job, budget=300, seed=1)
    e6 = xo_fit.snap(job, best, series={"L": "E6", "C": "E6"})
    e24 = xo_fit.snap(job, best, series={"L": "E24", "C": "E24"})
    assert e6.values != e24.values  # else the choice of --buy could not show
    folders = {}
    for name, d in (("fit", best), ("e6", e6), ("e24", e24)):
        d.save(tmp_path / name, plots=False)
        folders[name] = tmp_path / name
    return job, {"fit": best, "e6": e6, "e24": e24}, folders


def _bom(folder) -> list[dict]:
    with open(folder / "bom.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _section(page: str, title: str) -> str:
    return page.split(f"<h2>{title}", 1)[1].split("<h2>", 1)[0]


def test_buy_names_the_parts_to_buy_and_the_default_is_the_last_snap(designs, cli, tmp_path):
    """commands.md: `report RESULT... --buy RESULT`: bom.csv (docs/outputs.md's columns) holds the named result's
    values, quantities for --speakers; without --buy, the last snap given."""
    _, d, f = designs
    code, out, err = cli("report", f["fit"], f["e6"], f["e24"], "--out", tmp_path / "r", "--buy", f["e6"],
                         "--speakers", "3")
    assert code == 0, err
    rows = _bom(tmp_path / "r")
    from xo_fit.output.bom import BOM_COLUMNS

    assert list(rows[0]) == BOM_COLUMNS and "bom.csv" in out
    assert {r["name"]: float(r["value"]) for r in rows} == pytest.approx(d["e6"].values, rel=1e-5)
    assert all(r["quantity"] == "3" and r["source"] == "E6" for r in rows)
    page = (tmp_path / "r" / "report.html").read_text()
    assert re.findall(r"<h2>([^<]+)", page)[0] == "What to buy"  # first in the page
    assert "The parts of snap 1 (named with --buy) for 3 speakers" in page
    assert "Part list (snap 1)" in page
    # the default: the last snap given (E24), for a stereo pair
    code, out, err = cli("report", f["fit"], f["e6"], f["e24"], "--out", tmp_path / "r2")
    assert code == 0, err
    rows = _bom(tmp_path / "r2")
    assert {r["name"]: float(r["value"]) for r in rows} == pytest.approx(d["e24"].values, rel=1e-5)
    assert all(r["quantity"] == "2" and r["source"] == "E24" for r in rows)
    assert "The parts of snap 2 (the last snap given)" in (tmp_path / "r2" / "report.html").read_text()
    # a --buy result not among those given is added to the report
    code, _, err = cli("report", f["fit"], "--out", tmp_path / "r3", "--buy", f["e6"] / "result.json")
    assert code == 0, err
    page = (tmp_path / "r3" / "report.html").read_text()
    assert "Results: fit, snap." in page and _bom(tmp_path / "r3")[0]["source"] == "E6"


def test_a_report_of_a_fit_alone_says_its_values_are_continuous(designs, cli, tmp_path):
    """job-format.md "What to buy": a continuous result is never listed to buy silently."""
    _, _, f = designs
    out_dir = tmp_path / "r"
    assert cli("report", f["e6"], "--out", out_dir)[0] == 0 and (out_dir / "bom.csv").exists()
    code, out, err = cli("report", f["fit"], "--out", out_dir)
    assert code == 0, err
    page = (out_dir / "report.html").read_text()
    buy = _section(page, "What to buy")
    assert "continuous" in buy and "not buyable" in buy and "xo-fit snap" in buy and "<table" not in buy
    assert not (out_dir / "bom.csv").exists()  # the earlier report's list is gone, not left to mislead
    assert "no parts listed to buy" in out
    # named with --buy, it is listed, and said plainly to be continuous, in the page and in bom.csv
    code, _, err = cli("report", f["fit"], "--out", tmp_path / "r2", "--buy", f["fit"])
    assert code == 0, err
    buy = _section((tmp_path / "r2" / "report.html").read_text(), "What to buy")
    assert 'class="caution"' in buy and "not buyable as they are" in buy and "xo-fit snap" in buy
    rows = _bom(tmp_path / "r2")
    assert all(r["source"] == "continuous" and "not buyable" in r["notes"] for r in rows)


def _variant(write_job, fc: float, name: str):
    text, _ = ladder_job("LR2", fc=fc, spread=2.0, extra=STRESS)
    return xo_fit.simulate(xo_fit.load_job(write_job(f'name = "{name}"\n' + text, name=f"{name}.toml")))


def test_variants_keep_their_names_and_targets(write_job, tmp_path):
    """Two variants of a sweep (crossover at 1.8 and 2.2 kHz): each is labelled by its job's name and stage, the
    title names both, the targets table and the plotted target of each are there (the 1.8 kHz way targets
    cross at 1.8 kHz: LR2 is -6 dB at fc [SRC: docs/references.md, Linkwitz-Riley])."""
    a = _variant(write_job, 1800.0, "wren-fc1800")
    b = _variant(write_job, 2200.0, "wren-fc2200")
    page = xo_fit.write_report([a, b], tmp_path / "r").read_text()
    assert "<h1>wren-fc1800, wren-fc2200: crossover report</h1>" in page
    assert "Results: wren-fc1800: simulate, wren-fc2200: simulate." in page and "simulate 1" not in page
    targets = _section(page, "Targets")
    assert "<b>wren-fc1800: simulate</b>" in targets and "1.8 kHz" in targets
    assert "<b>wren-fc2200: simulate</b>" in targets and "2.2 kHz" in targets
    from xo_fit.output.report.figures import ways_figure
    from xo_fit.output.report.results import report_items

    fig = ways_figure(report_items([a, b]))
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    for name, fc in (("wren-fc1800: simulate", 1800.0), ("wren-fc2200: simulate", 2200.0)):
        woofer = lines[f"woofer target, {name}"]
        x, y = woofer.get_data()
        level = float(np.interp(np.log(fc), np.log(x), y))
        assert level == pytest.approx(float(y[0]) - 6.02, abs=0.05)
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_reference_lines_are_labelled_and_one_where_they_coincide(write_job):
    """The floor and 80 % of the rated impedance (IEC 60268-5: 80 % of 8 ohm = 6.4 ohm) drawn once with one
    label where equal; two lines, each labelled, where not."""
    from xo_fit.output.report.figures import impedance_figure
    from xo_fit.output.report.results import report_items

    for floor, want in ((6.4, {6.4: "floor 6.4 Ω = 80 % of the rated 8 Ω"}),
                        (5.0, {5.0: "floor 5 Ω", 6.4: "80 % of the rated 8 Ω"})):
        text, _ = ladder_job("LR2", impedance_min=floor, extra=STRESS)
        d = xo_fit.simulate(xo_fit.load_job(write_job(text)))
        fig = impedance_figure(report_items([d]))
        ax = fig.axes[0]
        flat = {round(float(ln.get_ydata()[0]), 6): ln.get_label() for ln in ax.get_lines()
                if len(set(np.ravel(ln.get_ydata()))) == 1}
        assert flat == want
        assert sorted(t.get_text() for t in ax.texts) == sorted(want.values())  # beside the line too
        assert sorted(t.get_text() for t in ax.get_legend().get_texts() if "|Z|" not in t.get_text()) \
            == sorted(want.values())
        import matplotlib.pyplot as plt

        plt.close(fig)


def test_no_curve_hides_another(write_job, tmp_path):
    """Three results with one curve (a snap and the spread of it once hid each other): each result's colour
    still shows in the summed response's PNG."""
    import matplotlib.image as mpimg
    import matplotlib.colors as mcolors

    from xo_fit.output.report.figures import RESULT_COLOURS

    text, _ = ladder_job("LR2")
    job = xo_fit.load_job(write_job(text))
    d = xo_fit.simulate(job, {"wL0": 1.6 * job.part("wL0").value})  # a dip off the target: no curve on it
    xo_fit.write_report([d, d, d], tmp_path / "r")
    rgb = mpimg.imread(tmp_path / "r" / "sum.png")[..., :3]
    for colour in RESULT_COLOURS[:3]:
        near = np.linalg.norm(rgb - np.array(mcolors.to_rgb(colour)), axis=-1) < 0.12
        assert near.sum() > 150, (colour, int(near.sum()))  # measured: about 300 each; 44 and 0 before


def test_the_tolerance_summary_is_in_the_report(designs, tmp_path):
    """The figures `xo-fit spread` prints (yield within the band and meeting the limits, the worst corner, pair
    matching, the sensitivity ranked by magnitude) are in the page."""
    job, d, _ = designs
    sp = xo_fit.spread(job, d["e24"], samples=64, seed=1)
    r = sp.result
    page = xo_fit.write_report([d["e24"], sp], tmp_path / "r").read_text()
    tol = _section(page, "Tolerance")
    assert f"{r.yield_band * 100:.1f} % of the builds stay within ±1 dB" in tol
    assert f"{r.yield_limits * 100:.1f} % meet rms error ≤ 1 dB and |Z| ≥ 6.4 Ω" in tol
    assert f"{r.corners['worst_deviation_db']:.2f} dB ({r.corners['method']})" in tol
    assert f"p50 {r.pair_p50_db:.2f} dB, p95 {r.pair_p95_db:.2f} dB" in tol
    assert f"{r.worst_deviation_db:.2f} dB off at {r.worst_at_hz:.0f} Hz" in tol
    ranked = re.findall(r"<tr><td>(\w+)</td><td>([+-][\d.]+)</td>", tol)
    assert [p for p, _ in ranked] == [x["part"] for x in r.sensitivity]
    sizes = [abs(float(x)) for _, x in ranked]
    assert len(ranked) == 4 and sizes == sorted(sizes, reverse=True)


def test_text_from_a_result_file_is_escaped(designs, tmp_path):
    """A result.json edited to carry markup in its job name, stage, part sources and prune steps: the page shows
    it as text (html.escape), nothing of it as markup."""
    _, _, f = designs
    path = f["e6"] / "result.json"
    doc = json.loads(path.read_text())
    doc["source"]["document"]["name"] = "<script>alert(1)"
    doc["stage"] = "snap<script>alert(2)"
    first = next(iter(doc["parts"]))
    doc["parts"][first]["source"] = doc["parts"][first]["series"] = "<script>alert(3)</script>"
    # (a prune section's cells are checked where it is read: tests/test_reliability.py covers them)
    path.write_text(json.dumps(doc))
    page = xo_fit.write_report([f["fit"], f["e6"]], tmp_path / "r").read_text()  # bought from: e6's parts
    assert "<script" not in page.lower() and "<b>open" not in page
    for shown in ("&lt;script&gt;alert(1)", "snap&lt;script&gt;alert(2)", "&lt;script&gt;alert(3)&lt;/script&gt;",
                  ):
        assert shown in page, shown
    assert "&lt;script&gt;alert(3)&lt;/script&gt;" in _section(page, "What to buy")


LW_ANGLES = ('[driver.{d}.angles]\nhorizontal = "{d}-h{{angle}}.txt"\nhorizontal_angles = [10, 20, 30]\n'
             'mirror = true\nvertical = "{d}-v{{angle}}.txt"\nvertical_angles = [10, -10]\n')


def test_no_empty_legend_when_only_the_listening_window_is_measured(write_job, tmp_path):
    """Angles for the listening window only (ANSI/CTA-2034-A: on axis, +-10 deg vertical, +-10..30 deg
    horizontal) give no sound power or early reflections, hence no DI to label: no legend there, and no
    matplotlib warning reaching the user."""
    files = {f"{d}0.txt": flat_curve() for d in "wt"}
    for d in "wt":
        files.update({f"{d}-h{a}.txt": flat_curve(level=90.0 - a / 10) for a in (10, 20, 30)})
        files.update({f"{d}-v{a}.txt": flat_curve(level=89.5) for a in (10, -10)})
    parts = "".join(f'[[part]]\nname = "{n}"\ntype = "driver"\ndriver = "{d}"\nnodes = ["{a}", "0"]\n'
                    for n, d, a in (("W", "w", "in"), ("T", "t", "t1")))
    text = ("[grid]\nf_min = 100\nf_max = 10000\npoints = 40\n"
            + "".join(f'[driver.{d}]\nresponse = "{d}0.txt"\nimpedance = 8\n' + LW_ANGLES.format(d=d) for d in "wt")
            + parts + '[[part]]\nname = "R1"\ntype = "R"\nnodes = ["in", "t1"]\nvalue = 2\n')
    d = xo_fit.simulate(xo_fit.load_job(write_job(text, files)))
    assert set(d.off_axis()[2]) >= {"on_axis", "listening_window"} and "sound_power" not in d.off_axis()[2]
    page = xo_fit.write_report([d], tmp_path / "r").read_text()
    assert 'alt="directivity"' in page
