"""The hard limits' part of the fused cost kernel: each candidate's violations, computed in the same pass.

:class:`LimitCode` adds to a :class:`xo_fit.model.fused.FusedCost` what its kernel needs to write, per
candidate, the violation of each ``[limits]`` limit and their total (the numbers of
:meth:`xo_fit.model.limits.LimitModel.violations`, to 1e-9): rows of ``tgt`` (each protected driver's excursion
and power factors over the band, each way's breakup stop band), scratch rows (|Z|^2 and the excursions per
frequency, whose extremes are taken after the frequency loop, like the stress term's peaks), IR statements
inside the frequency loop and after it. A job without ``[limits]`` builds none of this: its kernel text is
unchanged.
"""

from __future__ import annotations

import numpy as np

from xo_fit.constants import Z_SHORT_OHM
from xo_fit.model.limits import LN10_20, NAMES
from xo_fit.solver.codegen import B, F
from xo_fit.solver.ir import Array, Declared, Expr, assign, f8, let, loop, maximum, select, sqrt, update, when

#: The fused kernel's arrays this code reads and writes (xo_fit.model.fused).
TGT, SCRATCH, OUT = Array("tgt", 2), Array("scratch", 2), Array("out", 2)

#: A level below anything the kernel computes (its dB are floored at SPL_FLOOR_DB): the start of a maximum.
_LOWEST = -1e300
#: A |Z|^2 above anything the kernel computes: the start of a minimum.
_HIGHEST = 1e300


class LimitCode:
    """The limits' rows, scratch rows and lines of one fused kernel (see the module docstring).

    Built while the kernel's ``tgt`` rows are assembled.

    Parameters
    ----------
    cm : CostModel
        The job's reference cost, with its ``limits`` (:class:`xo_fit.model.limits.LimitModel`).
    rows : list of ndarray
        The ``tgt`` rows built so far, each shape (F,); this code's rows are appended (excursion factors in
        1/V^2, power factors in 1/V^2 over the band's point count, stop bands 1 inside and 0 outside; all 0
        outside the band).
    scratch0 : int
        The first scratch row free for this code (an index, dimensionless).
    lo, hi : int
        The band's index range [lo, hi) on the grid (indices, dimensionless).
    nf : int
        The grid's length F (a count, dimensionless).

    Attributes
    ----------
    scratch_rows : int
        How many scratch rows this code uses (a count, dimensionless), from ``scratch0`` on.
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

    def loop_lines(self, code, inband) -> list:
        """Statements inside the frequency loop: |Z|^2 and each judged driver's |V|^2 times its factors.

        Parameters
        ----------
        code : SolverCode
            The solver's code (:class:`xo_fit.solver.codegen.SolverCode`): its input impedance and driver
            voltages.
        inband : Expr or None
            The factor that keeps a sum to the band when the loop runs wider, or None; unused here (this
            code's ``tgt`` rows are 0 outside the band).

        Returns
        -------
        list of Stmt
            The statements, after the solve's in the loop's body.
        """
        out: list = []
        if self.row_z is not None:
            zr, zi = code.zin
            out.append(SCRATCH.store((self.row_z, F), maximum(zr * zr + zi * zi, Z_SHORT_OHM ** 2)))
        drivers = sorted({k for k, _, _ in self.excursions} | {k for k, _ in self.powers})
        for k in drivers:
            vr, vi = code.volts[k]
            out.append(let(f8(f"lv{k}"), vr * vr + vi * vi))
        for k, row, srow in self.excursions:
            out.append(SCRATCH.store((srow, F), f8(f"lv{k}") * TGT[row, F]))
        for k, row in self.powers:
            out.append(update(f8(f"lim_pw{k}"), f8(f"lv{k}") * TGT[row, F]))
        return out

    def start_lines(self) -> list:
        """Per candidate, before the frequency loop: the sums' starts."""
        return [let(f8(f"lim_pw{k}"), 0.0) for k, _ in self.powers]

    def end_lines(self, judged: list, k2: float, out_col: int, on: dict | None = None,
                  n_on: Expr | None = None) -> list:
        """Per candidate, after the level is known and the second pass is done: the extremes, each limit's
        violation and their total.

        Parameters
        ----------
        judged : list of tuple
            The rated parts (branch index, values column, kind R/L/C, rating in W, V or A) whose currents the
            kernel sums (``acc_r{m}``) or peaks (``mq{m}``), m their position here.
        k2 : float
            The ``[limits]`` drive scale squared (the drive's voltage over the source's, squared),
            dimensionless.
        out_col : int
            The output's column of the total violation; each limit's (in the order of
            :data:`xo_fit.model.limits.NAMES`) follows, dimensionless.
        on : dict, optional
            A prune family's switches (:func:`xo_fit.model.fused_rated.switches`): m -> the F8 flag of whether
            part m is judged (1.0) or removed (0.0); empty or None: every part is judged.
        n_on : Expr, optional
            With ``on``, the count of parts judged (the ratings limit is 0 where none is).

        Returns
        -------
        list of Stmt
            The statements, ending with the stores into ``out[b, out_col:out_col + 5]``.
        """
        lim = self.lim
        here = Declared()  # names of the candidate's block, set again and again
        v = {n: f8(n) for n in ("lim_zz", "lim_q", "lim_vz", "lim_vr", "lim_e", "lim_vp", "lim_mx", "lim_vb",
                                "lim_mb", "lim_t")}
        q, e = v["lim_q"], v["lim_e"]

        def extreme(row_value, best, lower: bool) -> list:
            better = q < best if lower else q > best
            return [loop(F, self.lo, self.hi, [let(q, row_value), when(better, [assign(best, q)])])]

        lines: list = []
        if self.row_z is not None:
            lines += [here.set(v["lim_zz"], _HIGHEST), *extreme(SCRATCH[self.row_z, F], v["lim_zz"], True),
                      here.set(v["lim_vz"], lim.floor / sqrt(v["lim_zz"]) - 1.0)]
        else:
            lines.append(here.set(v["lim_vz"], 0.0))
        lines.append(here.set(v["lim_vr"], _LOWEST if lim.rated else 0.0))
        rated = {j: m for m, (j, _, _, _) in enumerate(judged)}
        for j, _, kind, rating in lim.rated:
            m = rated[j]
            if kind == "R":
                lines.append(here.set(e, f8(f"acc_r{m}") / float(self.nb) * f8(f"x_{j}") * k2 / (rating / 2) - 1.0))
            elif kind == "C":
                lines.append(here.set(e, sqrt(2.0 * f8(f"mq{m}") * k2) / f8(f"x_{j}") / rating - 1.0))
            else:
                lines.append(here.set(e, sqrt(2.0 * f8(f"mq{m}") * k2) / rating - 1.0))
            worse = select(e > v["lim_vr"], e, v["lim_vr"])
            lines.append(here.set(v["lim_vr"], select(on[m] > 0.5, worse, v["lim_vr"]) if on else worse))
        if on and lim.rated and n_on is not None:
            lines.append(here.set(v["lim_vr"], select(n_on > 0.5, v["lim_vr"], 0.0)))
        lines.append(here.set(v["lim_vp"], _LOWEST if self.excursions or self.powers else 0.0))
        for _k, _, srow in self.excursions:
            lines += [here.set(v["lim_mx"], 0.0), *extreme(SCRATCH[srow, F], v["lim_mx"], False),
                      here.set(e, sqrt(v["lim_mx"]) - 1.0),
                      here.set(v["lim_vp"], select(e > v["lim_vp"], e, v["lim_vp"]))]
        for k, _ in self.powers:
            lines += [here.set(e, f8(f"lim_pw{k}") - 1.0),
                      here.set(v["lim_vp"], select(e > v["lim_vp"], e, v["lim_vp"]))]
        lines.append(here.set(v["lim_vb"], 0.0))
        if self.ways:
            lines.append(here.set(v["lim_mb"], _LOWEST))
            for k, row in self.ways:
                lines += extreme(select(TGT[row, F] > 0.5, SCRATCH[k, F], _LOWEST), v["lim_mb"], False)
            lines.append(here.set(v["lim_vb"], (v["lim_mb"] - f8("level") + lim.breakup_db) * LN10_20))
        cols = dict(zip(NAMES, (v["lim_vz"], v["lim_vr"], v["lim_vp"], v["lim_vb"])))
        lines.append(here.set(v["lim_t"], 0.0))
        lines += [update(v["lim_t"], select(c > 0.0, c, 0.0)) for c in cols.values()]
        lines.append(OUT.store((B, out_col), v["lim_t"]))
        lines += [OUT.store((B, out_col + 1 + i), cols[n]) for i, n in enumerate(NAMES)]
        return lines
