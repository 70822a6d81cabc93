"""Plots of a simulated design (matplotlib, imported only when a plot is drawn).

The figure shows what a designer checks first: each driver's acoustic output
in the network and their complex sum (dB SPL), the target where one is given,
and the impedance the amplifier sees (magnitude and phase) with the floor.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import acoustics
from .results import atomic_path


def plot_simulation(path: str | Path, frequencies: np.ndarray, driver_names: tuple[str, ...],
                    pressure: np.ndarray, total: np.ndarray, impedance: np.ndarray, *, title: str,
                    target_db: np.ndarray | None = None, impedance_floor: float = 0.0,
                    band: tuple[float, float] | None = None) -> None:
    """Write a PNG with SPL (drivers, sum, target) above impedance magnitude and phase.

    pressure: complex Pa (D, F); total: complex Pa (F,); impedance: complex ohm (F,).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(9, 7.5), sharex=True,
                                   gridspec_kw={"height_ratios": [3, 2]})
    for name, p in zip(driver_names, pressure):
        ax1.semilogx(frequencies, acoustics.spl_db(p), lw=1.2, label=name)
    sum_db = acoustics.spl_db(total)
    ax1.semilogx(frequencies, sum_db, color="k", lw=2.0, label="sum")
    if target_db is not None:
        ax1.semilogx(frequencies, target_db, color="k", lw=1.0, ls="--", label="target")
    top = float(np.nanmax(sum_db))
    ax1.set_ylim(top - 50, top + 6)
    ax1.set_ylabel("SPL (dB)")
    ax1.set_title(title)
    ax1.grid(True, which="both", alpha=0.3)
    ax1.legend(loc="lower center", ncol=min(len(driver_names) + 2, 5), fontsize=9)
    if band is not None:
        for f in band:
            ax1.axvline(f, color="0.6", lw=0.8, ls=":")
    zmag = np.abs(impedance)
    ax2.semilogx(frequencies, zmag, color="tab:purple", lw=1.5, label="|Z|")
    if impedance_floor > 0:
        ax2.axhline(impedance_floor, color="tab:red", lw=1.0, ls="--", label=f"floor {impedance_floor:g} Ω")
    ax2.set_ylabel("|Z| (Ω)")
    ax2.set_ylim(0, max(float(np.nanmax(zmag)) * 1.15, impedance_floor * 1.5, 1.0))
    ax2.grid(True, which="both", alpha=0.3)
    ax3 = ax2.twinx()
    ax3.semilogx(frequencies, acoustics.phase_deg(impedance), color="tab:gray", lw=1.0, label="phase")
    ax3.set_ylim(-90, 90)
    ax3.set_ylabel("phase (deg)")
    lines = ax2.get_legend_handles_labels()
    more = ax3.get_legend_handles_labels()
    ax2.legend(lines[0] + more[0], lines[1] + more[1], loc="upper right", fontsize=9)
    ax2.set_xlabel("frequency (Hz)")
    ax2.set_xlim(frequencies[0], frequencies[-1])
    fig.tight_layout()
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
