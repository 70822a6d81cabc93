"""The PNGs a designer reads: no empty legends or warnings, whole part counts, curves that do not hide each other."""

from __future__ import annotations

import warnings

import numpy as np

from conftest import ladder_job


def test_a_job_without_targets_plots_without_warnings(write_job, cli, tmp_path):
    """A one-way job with no targets plots without a warning (matplotlib warns "No artists with labels" and draws
    an empty box for a legend with nothing in it)."""
    job = write_job("""
[grid]
f_min = 20
f_max = 20000
points = 61
[driver.w]
response = 90
impedance = 8
[[part]]
name = "L1"
type = "L"
nodes = ["in", "a"]
value = "1mH"
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["a", "0"]
""")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        code, _, err = cli("simulate", job, "--out", tmp_path / "s")
    assert code == 0, err
    assert (tmp_path / "s" / "response.png").stat().st_size > 1000


def test_prune_figure_counts_whole_parts():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from xo_fit.output.plots import pruning_figure

    steps = [{"parts": n, "cost": 1.0 + (8 - n) * 0.1, "rms_error_db": 0.5, "removed": "R1" if n < 8 else "",
              "how": "open"} for n in (8, 7, 6)]
    fig = pruning_figure(plt, steps, 1, "t")
    ticks = [t for t in fig.axes[0].get_xticks() if 6 <= t <= 8]
    assert ticks and all(float(t).is_integer() for t in ticks)
    plt.close(fig)


def test_the_phase_panel_keeps_to_the_crossover(write_job):
    """Two stop bands clipped to one floor are no crossover: the plotted region stays near fc (an LR4 pair at
    2 kHz: both targets within 18 dB of the level only between about 1 and 4 kHz [DER from the LR4 slopes])."""
    import xo_fit
    from xo_fit.output.plots import crossover_pairs

    text, _ = ladder_job("LR4")
    d = xo_fit.simulate(xo_fit.load_job(write_job(text)))
    pairs = crossover_pairs(d.scored)
    assert len(pairs) == 1
    f = d.system.frequencies[pairs[0][2]]
    assert f.min() > 700 and f.max() < 6000
    assert np.all(np.diff(np.flatnonzero(pairs[0][2])) == 1)  # one contiguous region
