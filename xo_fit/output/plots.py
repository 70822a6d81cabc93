"""Plots of designs: the response PNG of simulate/fit/snap, the spread PNG, and the figure helpers the report uses.

One figure shows what a designer checks first: each way's acoustic output
against its way target and the summed response against the system target
(dB SPL); the phase difference of adjacent ways through each crossover against
the difference their targets have; and the impedance the amplifier sees
(magnitude and phase) with the floor. matplotlib is imported only when a plot
is drawn (it costs most of a second).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from xo_fit.model import acoustics
from xo_fit.model.cost import phase_error_deg
from xo_fit.io.results import atomic_path


def plain(text: str) -> str:
    """User text (a job name, a label) as matplotlib shows it literally: no "$...$" mathtext."""
    return str(text).replace("$", r"\$")


def set_ylim(ax, lo: float, hi: float) -> None:
    """ax.set_ylim when both ends are finite and apart (a curve of NaN or overflowed levels leaves the default)."""
    if np.isfinite(lo) and np.isfinite(hi) and hi > lo:
        ax.set_ylim(lo, hi)


def legend(ax, handles=None, labels=None, **kwargs) -> None:
    """A legend where something is labelled; none where nothing is (matplotlib would warn and draw an empty box)."""
    if handles is None:
        handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, **kwargs)


def plot_design(path: str | Path, system, s, *, title: str, compare: tuple | None = None) -> None:
    """Write a PNG for a scored design (xo_fit.search.fitting.Scored); ``compare`` = (label, other Scored) overlays
    another design's sum, phase error and impedance in grey (continuous against snapped)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    pairs = crossover_pairs(s)
    rows = 3 if pairs else 2
    fig, axes = plt.subplots(rows, 1, figsize=(9, 3.2 * rows + 1.2), sharex=True,
                             gridspec_kw={"height_ratios": [3] + [1.6] * (rows - 1)})
    _levels_panel(axes[0], system, s, title, compare)
    if pairs:
        _phase_panel(axes[1], system, s, pairs)
    _impedance_panel(axes[rows - 1], system, s, compare)
    fig.subplots_adjust(left=0.08, right=0.92, top=0.95, bottom=0.07, hspace=0.12)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    plt.close(fig)


def _levels_panel(ax, system, s, title: str, compare: tuple | None) -> None:
    """The top panel: each way against its way target, the sum (and a compared design's) against the target."""
    import matplotlib.pyplot as plt

    f = system.frequencies
    names = tuple(d.name for d in system.job.drivers)
    pressure, total = s.sim.pressure[0], s.sim.total[0]
    targets = s.targets
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for i, (name, p) in enumerate(zip(names, pressure)):
        c = colors[i % len(colors)]
        ax.semilogx(f, acoustics.spl_db(p), lw=1.3, color=c, label=name)
        if targets is not None and targets.has_way[i]:
            ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(targets.ways[i])), lw=0.9, ls="--", color=c,
                        label=f"{name} target")
    sum_db = acoustics.spl_db(total)
    if compare is not None:
        other = compare[1].sim
        for i, p in enumerate(other.pressure[0]):
            ax.semilogx(f, acoustics.spl_db(p), lw=0.9, color=colors[i % len(colors)], alpha=0.45)
        ax.semilogx(f, acoustics.spl_db(other.total[0]), color="0.55", lw=1.6, label=f"sum, {compare[0]}")
    ax.semilogx(f, sum_db, color="k", lw=2.0, label="sum")
    if system.job.target.reference == "listening_window" and system.positions:
        ax.semilogx(f, system.reference_db(s.sim)[0], color=colors[len(names) % len(colors)], lw=1.8, ls="-.",
                    label="listening window")
    if targets is not None:
        ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(targets.system)), color="k", lw=1.0, ls="--",
                    label="target")
    top = float(np.nanmax(sum_db))
    set_ylim(ax, top - 50, top + 6)
    ax.set_ylabel("SPL (dB)")
    ax.set_title(plain(title))
    ax.grid(True, which="both", alpha=0.3)
    legend(ax, loc="lower center", ncol=4, fontsize=8)
    band = system.job.target.band
    if band is not None:
        for b in band:
            ax.axvline(b, color="0.6", lw=0.8, ls=":")


def _phase_panel(axp, system, s, pairs: list) -> None:
    """The phase error of adjacent ways through each crossover region, against their targets' difference."""
    f = system.frequencies
    names = tuple(d.name for d in system.job.drivers)
    pressure, targets = s.sim.pressure[0], s.targets
    worst = 0.0
    for a, b, region in pairs:
        err = phase_error_deg(pressure[a] / pressure[b], np.rad2deg(np.angle(targets.ways[a] / targets.ways[b])))
        axp.semilogx(f[region], err[region], lw=1.5, label=f"{names[a]} - {names[b]}, against target")
        worst = max(worst, float(np.nanmax(np.abs(err[region]))))
    axp.axhline(0, color="k", lw=0.8)
    axp.set_ylabel("phase error (deg)")
    span = min(180.0, max(90.0, 30.0 * np.ceil(worst / 30.0)))  # a 95 degree error once ran off a +-90 axis
    axp.set_ylim(-span, span)
    axp.grid(True, which="both", alpha=0.3)
    legend(axp, loc="upper right", fontsize=8)


def _impedance_panel(ax2, system, s, compare: tuple | None) -> None:
    """|Z| with the floor, and its phase on a second axis."""
    f = system.frequencies
    z = s.sim.impedance[0]
    zmag = np.abs(z)
    floor = system.job.cost.impedance_min
    if compare is not None:
        ax2.semilogx(f, np.abs(compare[1].sim.impedance[0]), color="0.6", lw=1.2, label=f"|Z|, {compare[0]}")
    ax2.semilogx(f, zmag, color="tab:purple", lw=1.5, label="|Z|")
    if floor > 0:
        ax2.axhline(floor, color="tab:red", lw=1.0, ls="--", label=f"floor {floor:g} Ω")
    ax2.set_ylabel("|Z| (Ω)")
    set_ylim(ax2, 0, max(float(np.nanmax(zmag)) * 1.15, floor * 1.5, 1.0))
    ax2.grid(True, which="both", alpha=0.3)
    ax3 = ax2.twinx()
    ax3.semilogx(f, acoustics.phase_deg(z), color="tab:gray", lw=1.0, label="phase")
    ax3.set_ylim(-90, 90)
    ax3.set_ylabel("phase (deg)")
    h1, l1 = ax2.get_legend_handles_labels()
    h2, l2 = ax3.get_legend_handles_labels()
    legend(ax2, h1 + h2, l1 + l2, loc="upper right", fontsize=8)
    ax2.set_xlabel("frequency (Hz)")
    ax2.set_xlim(f[0], f[-1])


def crossover_pairs(s) -> list:
    """Crossover regions on the full grid: (way a, way b, mask) for adjacent ways whose targets cross."""
    t = s.targets
    if t is None:
        return []
    from xo_fit.model.cost import XO_REGION_DB, adjacent_ways, spl_db_unit

    db = spl_db_unit(np.where(t.has_way[:, None], t.ways, 1.0))
    out = []
    for a, b in adjacent_ways(db, t.has_way):
        near = np.abs(db[a] - db[b]) <= 2 * XO_REGION_DB  # wider than the cost's region: the plot shows the run-up
        # ... but where both targets are deep in their stop bands they are no crossover (two stop bands clipped to
        # one floor once drew a "crossover" over the whole band)
        near &= np.maximum(db[a], db[b]) > -2 * XO_REGION_DB - 6.0
        if near.any():
            out.append((a, b, near))
    return out


def plot_spread(path: str | Path, system, s, r, *, title: str) -> None:
    """Nominal summed and driver levels inside their p05-p95 bands over the tolerance draws."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    f = system.frequencies
    lw = system.job.target.reference == "listening_window" and bool(system.positions)
    names = ["listening window" if lw else "sum"] + [d.name for d in system.job.drivers]
    fig, ax = plt.subplots(1, 1, figsize=(9, 5.2))
    colors = ["k"] + plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for i, name in enumerate(names):
        c = colors[i % len(colors)]
        ax.fill_between(f, r.p05[i], r.p95[i], color=c, alpha=0.18 if i else 0.25, lw=0)
        ax.semilogx(f, r.nominal_db[i], color=c, lw=2.0 if i == 0 else 1.2, label=f"{name} (nominal, p05-p95)")
    top = float(np.nanmax(r.nominal_db[0]))
    set_ylim(ax, top - 40, top + 6)
    ax.set_xlim(f[0], f[-1])
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("SPL (dB)")
    ax.set_title(plain(title))
    ax.grid(True, which="both", alpha=0.3)
    legend(ax, loc="lower center", fontsize=8, ncol=3)
    fig.subplots_adjust(left=0.08, right=0.97, top=0.93, bottom=0.1)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    plt.close(fig)


def plot_pruning(path: str | Path, steps: list[dict], chosen: int, *, title: str) -> None:
    """The trade-off of a prune: cost and rms error against the number of parts, the chosen step marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = pruning_figure(plt, steps, chosen, title)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    plt.close(fig)


def pruning_figure(plt, steps: list[dict], chosen: int, title: str):
    """The prune plot on pyplot ``plt``: cost (log scale where every cost is above 0) and rms error in dB
    against the number of R, L and C parts, each removal annotated and the chosen step circled."""
    parts = [r["parts"] for r in steps]
    cost = [r["cost"] if r["cost"] is not None else np.nan for r in steps]
    rms = [r["rms_error_db"] if r["rms_error_db"] is not None else np.nan for r in steps]
    fig, ax = plt.subplots(figsize=(9, 3.8))
    ax.plot(parts, cost, "o-", color="k", label="cost")
    ax.plot([parts[chosen]], [cost[chosen]], "o", ms=12, mfc="none", mec="tab:red", label="chosen")
    for k, r in enumerate(steps[1:]):
        ax.annotate(f"-{r['removed']} ({r['how']})", (r["parts"], r["cost"] or 0), fontsize=7, rotation=30,
                    textcoords="offset points", xytext=(3, 6 if k % 2 == 0 else -14))
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # a part count is a whole number
    ax.set_xlabel("R, L and C parts")
    ax.set_ylabel("cost")
    if all(np.isfinite(c) and c > 0 for c in cost):
        ax.set_yscale("log")
    ax.invert_xaxis()
    ax2 = ax.twinx()
    ax2.plot(parts, rms, "s--", color="tab:blue", ms=4, label="rms error (dB)")
    ax2.set_ylabel("rms error (dB)")
    ax.set_title(plain(title), fontsize=10)
    ax.grid(True, alpha=0.3)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    legend(ax, h1 + h2, l1 + l2, fontsize=8, loc="upper left")
    fig.tight_layout()
    return fig


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes (100 dpi); the figure is closed."""
    import io

    buf = io.BytesIO()
    fig.savefig(buf, dpi=100, format="png")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buf.getvalue()


def spl_db_of(p: np.ndarray) -> np.ndarray:
    """Sound pressure level in dB SPL re 20 uPa of complex pressures ``p`` in Pa (any shape, the same
    shape back; :func:`xo_fit.model.acoustics.spl_db`)."""
    return acoustics.spl_db(p)


def finish_axes(ax, ylabel: str, title: str, f: np.ndarray, top: float | None = None) -> None:
    """Label and finish a frequency plot: x from f[0] to f[-1] in Hz, ``ylabel``, ``title``, a grid and a
    legend; with ``top`` (dB) the y range is top - 50 to top + 6."""
    if top is not None:
        set_ylim(ax, top - 50, top + 6)
    ax.set_xlim(f[0], f[-1])
    ax.set_ylabel(ylabel)
    ax.set_xlabel("frequency (Hz)")
    ax.set_title(plain(title), fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    legend(ax, fontsize=7, loc="best")
    ax.figure.tight_layout()
