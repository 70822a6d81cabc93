"""``xo-fit baffle``: each driver's diffraction response on the job's baffle, as baffle.csv and baffle.png.

The response is :func:`~xo_fit.model.diffraction.driver_diffraction` (docs/baffle.md) on the job's grid, on
the axis and at an off-axis job's positions: the factor a ``baffle = true`` curve of the driver is multiplied
by, and for the other drivers what it would be. No measurement file is read.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from xo_fit.errors import JobError
from xo_fit.io.results import Table, atomic_path, write_csv
from xo_fit.job.model import FileCurve, Job
from xo_fit.model.diffraction import AXIS, driver_diffraction, job_positions

#: Common practice's baffle-step frequency, Hz m: 115/W for a baffle W m wide (after H. F. Olson); in this model
#: the step is complete near it, its -3 dB midpoint at 0.4-0.7 of it (docs/baffle.md).
STEP_HZ_M = 115.0


@dataclass(frozen=True, eq=False)
class BaffleResponses:
    """Each driver's diffraction response: ``response`` complex (D, A, F) at ``frequencies`` (F,) Hz and
    ``positions`` (A,) (the axis first), drivers in job order (``names``)."""

    job: Job
    frequencies: np.ndarray
    positions: tuple
    names: tuple[str, ...]
    response: np.ndarray

    @property
    def width(self) -> float:
        """The baffle's width x[1] - x[0], m."""
        baffle = self.job.baffle
        assert baffle is not None  # baffle_responses needs the job's [baffle]
        return baffle.x[1] - baffle.x[0]

    def table(self) -> Table:
        """baffle.csv: ``frequency_hz``, each driver's ``<driver>_db`` and ``<driver>_deg`` on the axis, then at
        each other position ``<driver>_<orbit><angle>_db`` and ``_deg`` (docs/outputs.md)."""
        cols: dict[str, np.ndarray] = {"frequency_hz": self.frequencies}
        for i, pos in enumerate(self.positions):
            tag = "" if i == 0 else f"_{pos[0]}{pos[1]}"
            for k, name in enumerate(self.names):
                d = self.response[k, i]
                cols[f"{name}{tag}_db"] = 20 * np.log10(np.maximum(np.abs(d), 1e-30))
                cols[f"{name}{tag}_deg"] = np.degrees(np.angle(d))
        return Table(cols)

    def lines(self) -> list[str]:
        """One line per driver for the command to print: its level at the grid's ends, where the step is halfway
        (-3 dB), the ripple above 115/W, and which of its curves take the diffraction."""
        from xo_fit.units import format_value

        f = self.frequencies
        step = STEP_HZ_M / self.width
        out = []
        for k, spec in enumerate(self.job.drivers):
            db = 20 * np.log10(np.maximum(np.abs(self.response[k, 0]), 1e-30))
            half = format_value(float(f[np.argmax(db > -3.0103)]), "Hz", 3) if np.any(db > -3.0103) else "-"
            above = db[f > step]
            ripple = f"{above.min():+.2f} to {above.max():+.2f} dB" if above.size else "-"
            x, y = spec.position or (0.0, 0.0)
            out.append(f"  {spec.name:<10} at ({x * 1e3:g}, {y * 1e3:g}) mm: {db[0]:+.2f} dB at "
                       f"{format_value(f[0], 'Hz')}, -3 dB at {half}, above 115/W ({format_value(step, 'Hz', 3)}) "
                       f"{ripple}; {applies_to(spec)}")
        return out

    def save(self, folder: str | Path, plots: bool = True) -> list[Path]:
        """Write baffle.csv (and baffle.png) into ``folder``; return the paths written."""
        folder = Path(folder)
        write_csv(folder / "baffle.csv", self.table())
        paths = [folder / "baffle.csv"]
        if plots:
            plot_baffle(folder / "baffle.png", self)
            paths.append(folder / "baffle.png")
        return paths


def applies_to(spec) -> str:
    """Which of a driver's curves take the diffraction, in words (``check`` and ``xo-fit baffle``)."""
    if not spec.baffle:
        return "not applied (no baffle = true: its data hold the cabinet)"
    if not isinstance(spec.response, FileCurve):
        return "applied to its near field at every position before the splice"
    if spec.angles is None:
        return "applied to its half-space curve on the axis"
    return ("applied to its half-space curve and each angle file at its position"
            + (" (a point source: the files hold its directivity; radius not used)" if spec.radius else ""))


def baffle_responses(job: Job) -> BaffleResponses:
    """Every driver's diffraction response on the job's baffle, on its grid and at its positions.

    Raises JobError when the job has no ``[baffle]``.
    """
    if job.baffle is None:
        raise JobError("the job has no [baffle]: give its front's edges, x = [left, right] and y = [bottom, top]",
                       path=job.path, key="[baffle]")
    f = job.grid.frequencies
    positions = job_positions(job) or AXIS
    d = np.stack([driver_diffraction(job, spec, f, positions) for spec in job.drivers])
    return BaffleResponses(job=job, frequencies=f, positions=positions, names=tuple(s.name for s in job.drivers),
                           response=d)


def plot_baffle(path: str | Path, b: BaffleResponses) -> None:
    """baffle.png: each driver's step and ripple on the axis (level and phase), 115/W marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from xo_fit.output.plots import finish_axes, legend, plain

    f = b.frequencies
    fig, (ax, axp) = plt.subplots(2, 1, figsize=(9, 6.4), sharex=True, gridspec_kw={"height_ratios": [3, 1.6]})
    for k, name in enumerate(b.names):
        d = b.response[k, 0]
        line, = ax.semilogx(f, 20 * np.log10(np.abs(d)), lw=1.5, label=f"{name} on axis")
        axp.semilogx(f, np.degrees(np.angle(d)), lw=1.2, color=line.get_color())
        if len(b.positions) > 1 and ("h", 30) in b.positions:
            i = b.positions.index(("h", 30))
            ax.semilogx(f, 20 * np.log10(np.abs(b.response[k, i])), lw=0.8, ls="--", color=line.get_color(),
                        label=f"{name} at h30")
    width = b.width
    for a in (ax, axp):
        a.axvline(STEP_HZ_M / width, color="0.5", ls=":", lw=1)
    ax.axhline(-6.02, color="0.6", lw=0.8)
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.set_ylim(-12, 6)
    finish_axes(ax, "diffraction (dB re half space)", f"{plain(b.job.name)}: the baffle's diffraction "
                f"(dotted: 115/W, W = {width * 1e3:g} mm)", f)
    ax.set_xlabel("")
    legend(ax, fontsize=8, loc="lower right")
    finish_axes(axp, "phase (deg)", "", f)
    fig.subplots_adjust(left=0.09, right=0.97, top=0.94, bottom=0.08, hspace=0.1)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    plt.close(fig)
