"""The hard limits' part of the fused cost kernel: each candidate's violations, computed in the same pass.

:class:`LimitCode` adds to a :class:`xo_fit.model.fused.FusedCost` what its kernel needs to write, per
candidate, the violation of each ``[limits]`` limit and their total (the numbers of
:meth:`xo_fit.model.limits.LimitModel.violations`, to 1e-9): rows of ``tgt`` (each protected driver's excursion
and power factors over the band, each way's breakup stop band), scratch rows (|Z|^2 and the excursions per
frequency, whose extremes are taken after the frequency loop, like the stress term's peaks), lines inside the
frequency loop and lines after it. A job without ``[limits]`` builds none of this: its kernel text is
unchanged.
"""

from __future__ import annotations

import numpy as np

from xo_fit.constants import Z_SHORT_OHM
from xo_fit.model.limits import LN10_20, NAMES

#: A level below anything the kernel computes (its dB are floored at SPL_FLOOR_DB): the start of a maximum.
_LOWEST = -1e300
#: A |Z|^2 above anything the kernel computes: the start of a minimum.
_HIGHEST = 1e300


class LimitCode:
    """The limits' rows, scratch rows and lines of one fused kernel (see the module docstring).

    Built while the kernel's ``tgt`` rows are assembled: ``rows`` (the list being built) receives this code's
    rows; ``scratch0`` is the first scratch row free for it; ``lo``, ``hi`` the band's index range; ``nf`` the
    grid's length.
    """

    def __init__(self, cm, rows: list, scratch0: int, lo: int, hi: int, nf: int) -> None:
        lim = cm.limits
        self.lim = lim
        self.lo, self.hi = lo, hi
        self.nb = hi - lo
        self.scratch0 = scratch0
        n = 0
        self.row_z = None
        if lim.floor > 0:
            self.row_z = scratch0
            n += 1
        # protection: per judged driver its excursion factor 2 s^2 |x/V|^2 / xmax^2 (a scratch row each, maximum
        # taken after the loop) and its power factor s^2 Re(1/Z) / rating / Fb (summed in the loop), band only
        self.excursions: list[tuple[int, int, int]] = []  # (driver index, tgt row, scratch row)
        self.powers: list[tuple[int, int]] = []  # (driver index, tgt row)
        p = lim.protection
        if p is not None:
            use_x, use_p = lim.judged_protection()
            for i, k in enumerate(p.index):
                if use_x[i]:
                    r = np.zeros(nf)
                    r[lo:hi] = 2 * p.scale**2 * np.abs(p.x_per_volt[i, lo:hi]) ** 2 / p.xmax[i] ** 2
                    self.excursions.append((int(k), len(rows), scratch0 + n))
                    rows.append(r)
                    n += 1
                if use_p[i]:
                    r = np.zeros(nf)
                    r[lo:hi] = p.scale**2 * p.conductance[i, lo:hi] / p.rating[i] / self.nb
                    self.powers.append((int(k), len(rows)))
                    rows.append(r)
        # breakup: each way's stop band (1 inside)
        self.ways: list[tuple[int, int]] = []  # (driver index, tgt row)
        for k in np.nonzero(lim.stop.any(axis=-1))[0]:
            r = np.zeros(nf)
            r[lo:hi] = lim.stop[k]
            self.ways.append((int(k), len(rows)))
            rows.append(r)
        self.scratch_rows = n

    def loop_lines(self, code, inband: str) -> list[str]:
        """Lines inside the frequency loop (``code``: the solver's SolverCode; ``inband``: the factor that keeps
        a sum to the band when the loop runs wider)."""
        out = []
        if self.row_z is not None:
            zr, zi = code.zin
            out.append(f"scratch[{self.row_z}, f] = max({zr} * {zr} + {zi} * {zi}, {Z_SHORT_OHM ** 2!r})")
        drivers = sorted({k for k, _, _ in self.excursions} | {k for k, _ in self.powers})
        for k in drivers:
            vr, vi = code.volts[k]
            out.append(f"lv{k} = {vr} * {vr} + {vi} * {vi}")
        for k, row, srow in self.excursions:
            out.append(f"scratch[{srow}, f] = lv{k} * tgt[{row}, f]")
        for k, row in self.powers:
            out.append(f"lim_pw{k} += lv{k} * tgt[{row}, f]")
        return out

    def start_lines(self) -> list[str]:
        """Per candidate, before the frequency loop: the sums' starts."""
        return [f"lim_pw{k} = 0.0" for k, _ in self.powers]

    def end_lines(self, judged: list, k2: float, out_col: int) -> list[str]:
        """Per candidate, after the level is known and the second pass is done: the extremes, each limit's
        violation and their total into ``out[b, out_col:out_col + 5]``. ``judged``: the rated parts whose
        currents the kernel sums (``acc_r{m}``) or peaks (``mq{m}``); ``k2``: the drive scale squared."""
        i1, i2 = " " * 4, " " * 8
        lim = self.lim
        lines = []
        rng = f"for f in range({self.lo}, {self.hi}):"
        if self.row_z is not None:
            lines += ["lim_zz = " + repr(_HIGHEST), rng, i1 + f"lim_q = scratch[{self.row_z}, f]",
                      i1 + "if lim_q < lim_zz:", i2 + "lim_zz = lim_q",
                      f"lim_vz = {lim.floor!r} / sqrt(lim_zz) - 1.0"]
        else:
            lines.append("lim_vz = 0.0")
        lines.append(f"lim_vr = {_LOWEST!r}" if lim.rated else "lim_vr = 0.0")
        rated = {j: m for m, (j, _, _, _) in enumerate(judged)}
        for j, _, kind, rating in lim.rated:
            m = rated[j]
            if kind == "R":
                lines.append(f"lim_e = acc_r{m} / {self.nb}.0 * x_{j} * {k2!r} / {rating / 2!r} - 1.0")
            elif kind == "C":
                lines.append(f"lim_e = sqrt(2.0 * mq{m} * {k2!r}) / x_{j} / {rating!r} - 1.0")
            else:
                lines.append(f"lim_e = sqrt(2.0 * mq{m} * {k2!r}) / {rating!r} - 1.0")
            lines.append("lim_vr = lim_e if lim_e > lim_vr else lim_vr")
        lines.append(f"lim_vp = {_LOWEST!r}" if self.excursions or self.powers else "lim_vp = 0.0")
        for _k, _, srow in self.excursions:
            lines += ["lim_mx = 0.0", rng, i1 + f"lim_q = scratch[{srow}, f]", i1 + "if lim_q > lim_mx:",
                      i2 + "lim_mx = lim_q", "lim_e = sqrt(lim_mx) - 1.0",
                      "lim_vp = lim_e if lim_e > lim_vp else lim_vp"]
        for k, _ in self.powers:
            lines += [f"lim_e = lim_pw{k} - 1.0", "lim_vp = lim_e if lim_e > lim_vp else lim_vp"]
        lines.append("lim_vb = 0.0")
        if self.ways:
            lines.append(f"lim_mb = {_LOWEST!r}")
            for k, row in self.ways:
                lines += [rng, i1 + f"lim_q = scratch[{k}, f] if tgt[{row}, f] > 0.5 else {_LOWEST!r}",
                          i1 + "if lim_q > lim_mb:", i2 + "lim_mb = lim_q"]
            lines += [f"lim_vb = (lim_mb - level + {lim.breakup_db!r}) * {LN10_20!r}"]
        cols = dict(zip(NAMES, ("lim_vz", "lim_vr", "lim_vp", "lim_vb")))
        lines.append("lim_t = 0.0")
        lines += [f"lim_t += {c} if {c} > 0.0 else 0.0" for c in cols.values()]
        lines.append(f"out[b, {out_col}] = lim_t")
        lines += [f"out[b, {out_col + 1 + i}] = {cols[n]}" for i, n in enumerate(NAMES)]
        return lines
