"""The fused kernel: solve the network and reduce the cost terms in one compiled pass per candidate.

A fit spends nearly all of its time evaluating the cost of candidate designs. Computing dB curves in numpy
costs several microseconds per candidate, far more than the solve; this kernel instead extends the solver's
straight-line code (:func:`xo_fit.solver.codegen.solver_code`) with each driver's pressure, the complex sum,
their levels in dB (through :func:`xo_fit.solver.vecmath.ln_floored`, which vectorises), the phase chords
through the crossover regions, the impedance shortfall and the rated parts' currents, and reduces them over
the band inside the frequency loop (the off-axis curves in loops after it). The terms are exactly those of
:class:`xo_fit.model.cost.CostModel` (the reference implementation, against which tests hold this kernel to
1e-9), but for ``protection``, which it lacks.

The structure of the cost (which drivers have way targets, which pairs meet at a crossover, the band's index
range, a fixed or automatic level, the weights) is written into the generated code as constants; the curves
are passed as one array ``tgt``. The kernel is compiled with ``reassoc`` as well as ``contract``: LLVM
vectorises floating-point sums over the frequency loop only when it may reorder them. Candidates with a
flagged point (a pivot too small, a NaN) are re-scored by the reference path.
"""

from __future__ import annotations

import math

import numpy as np

from xo_fit.constants import P_REF, PIVOT_TOLERANCE, SPL_FLOOR_DB, Z_SHORT_OHM
from xo_fit.model.acoustics import used_positions
from xo_fit.model.cost import BREAKUP_FLOOR_DB, NULL_DB, PHASE_DEG_PER_DB, TERMS
from xo_fit.model.limits import NAMES
from xo_fit.model.fused_preference import preference_lines
from xo_fit.model.fused_rated import switches
from xo_fit.solver.codegen import B, F, FIN, R_COEF, R_EXP, RS, TAU2, VALS, VS, solver_code
from xo_fit.solver.ir import (DB10, Array, Const, Function, Named, Not, Return, assign, f8, i8, let, ln_floored, loop,
                              maximum, select, signed_sum, sqrt, total, update, when, wrap)
from xo_fit.solver.ir_kernel import Kernel
from xo_fit.solver.ir_python import text as python_text
from xo_fit.solver.kernels import KERNEL_VERSION, load_kernel

#: |p|^2 floor (Pa^2) matching SPL_FLOOR_DB: levels below it read as the floor.
_P2_FLOOR = (P_REF * 10 ** (SPL_FLOOR_DB / 20)) ** 2
_PREF_DB = 20 * math.log10(P_REF)
#: Columns of evaluate_raw's output: cost, the terms, then the level and the flag; with [cost] preference, the
#: preference term after them; with [limits], the total violation and each limit's (xo_fit.model.limits.NAMES)
#: after those (a job without them keeps the kernel it had).
LEVEL = 1 + len(TERMS)
#: The kernel's arrays beyond the solver's (xo_fit.solver.codegen) and its module constants.
TGT, ANG, ANGW, SCRATCH, OUT = Array("tgt", 2), Array("ang", 3), Array("angw", 2), Array("scratch", 2), Array("out", 2)
P2F, PREF_DB = Named("P2F", _P2_FLOOR), Named("PREF_DB", _PREF_DB)
FLAG = LEVEL + 1
PREFERENCE = FLAG + 1


def _db(p2):
    """The level of |p|^2 in dB SPL, floored at SPL_FLOOR_DB: ``DB10 * ln_floored(max(p2, P2F)) - PREF_DB``."""
    return DB10 * ln_floored(maximum(p2, P2F)) - PREF_DB


def _merge_alike(g: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions whose per-volt factors are identical (one file standing for two positions) as one, with their
    weights added: g (A, D, F) complex, w (A, K) -> (A', D, F), (A', K). |p|^2 is the same at both, so each
    weighted sum is unchanged (up to rounding)."""
    keep: list[int] = []
    weights: list[np.ndarray] = []
    for i in range(g.shape[0]):
        twin = next((k for k, j in enumerate(keep) if np.array_equal(g[j], g[i])), None)
        if twin is None:
            keep.append(i)
            weights.append(w[i].copy())
        else:
            weights[twin] = weights[twin] + w[i]
    return g[keep], np.array(weights)


class FusedCost:
    """Cost of batches of designs through one generated kernel; same numbers as CostModel.evaluate.

    Parameters
    ----------
    cm : CostModel
        The job's reference cost (:class:`xo_fit.model.cost.CostModel`); its system, band, targets, weights and
        limits are written into the kernel. Its band must be a contiguous range of the grid (else ValueError).
    """

    stand_ins: dict | None = None  #: a prune family's values of removed parts (fused_rated.switches); None: a fit's

    def __init__(self, cm) -> None:
        self.cm = cm
        net = cm.system.network
        self.net = net
        f = cm.system.frequencies
        band_idx = np.nonzero(cm.band)[0]
        self.lo, self.hi = int(band_idx[0]), int(band_idx[-1]) + 1
        if self.hi - self.lo != band_idx.size:
            raise ValueError("the target band must be a contiguous range of the grid")
        d = len(net.driver_names)
        nf = f.size
        rows = self._target_rows(d, nf)
        ang, angw = self._positions(d, nf)
        self.ang = np.ascontiguousarray(ang)
        self.angw = np.ascontiguousarray(angw)
        self.row_xc = len(rows)
        x = np.zeros(nf)
        lx = np.log2(f[self.lo:self.hi])
        x[self.lo:self.hi] = lx - lx.mean()
        rows.append(x)
        self.sxx = float(np.sum(x**2))
        self.flo, self.fhi = self.lo, self.hi  # the solve's frequency range: the band, or what the preference reads
        if self.plan is not None:
            rows += self._preference_rows(nf)
        # the rated parts whose currents the kernel reduces: the stress term's, or the ratings limit's (the same
        # parts when both are asked for)
        self.judged = cm.rated or (cm.limits.rated if cm.limits is not None else [])
        # scratch rows per frequency: driver dB (D), sum dB, impedance shortfall, peak stresses, the early
        # reflections' and sound power's dB, driver voltages (2D), the three position sums; with the preference,
        # the on-axis, listening window, sound power and in-room dB; then the limits' rows
        n_peaks = sum(kind != "R" for _, _, kind, _ in self.judged)
        self.scratch_rows = d + 4 + n_peaks + 2 * d + 3 + (4 if self.plan is not None else 0)
        self.limit_code = None
        self.col_limits = FLAG + (2 if self.plan is not None else 1)  # the total violation's column, with limits
        if cm.limits is not None:
            from xo_fit.model.fused_limits import LimitCode

            self.limit_code = LimitCode(cm, rows, self.scratch_rows, self.lo, self.hi, nf)
            self.scratch_rows += self.limit_code.scratch_rows
        self.tgt = np.ascontiguousarray(np.vstack(rows))
        self._kernel = None

    def _target_rows(self, d: int, nf: int) -> list[np.ndarray]:
        """The rows of ``tgt`` the frequency loop reads: each driver's per-volt factor (re, im), each way's
        target and stop band, the system target, the points the level is kept on, and each crossover pair's
        region and target phase difference; their first rows are noted on ``self``."""
        cm = self.cm
        rows: list[np.ndarray] = []
        factors = cm.system.factors
        for k in range(d):
            rows += [factors[k].real, factors[k].imag]
        self.row_tway = len(rows)
        for k in range(d):
            r = np.zeros(nf)
            r[self.lo:self.hi] = cm.t_way_db[k]
            rows.append(r)
        self.row_stop = len(rows)
        for k in range(d):
            r = np.zeros(nf)
            r[self.lo:self.hi] = cm.stop[k] & cm.has_way[k]
            rows.append(r)
        self.row_tsys = len(rows)
        r = np.zeros(nf)
        r[self.lo:self.hi] = cm.t_sys_db
        rows.append(r)
        self.row_keep = len(rows)
        r = np.zeros(nf)
        r[self.lo:self.hi] = cm.keep
        rows.append(r)
        self.n_keep = int(cm.keep.sum())
        self.row_pairs = len(rows)
        self.pair_counts = []
        for _a, _b, region, target_diff in cm.pairs:
            reg = np.zeros(nf)
            reg[self.lo:self.hi] = region
            w = np.zeros(nf, dtype=complex)
            w[self.lo:self.hi] = np.exp(-1j * np.deg2rad(target_diff))
            rows += [reg, w.real, w.imag]
            self.pair_counts.append(int(region.sum()))
        return rows

    def _positions(self, d: int, nf: int) -> tuple[np.ndarray, np.ndarray]:
        """Off axis: the per-volt factors of each driver at the positions the cost reads, (A, 2D, F), with each
        position's weight in the listening window, early reflections and sound power (A, 3)."""
        cm = self.cm
        names = ("listening_window", "early_reflections", "sound_power")
        self.need = {n: n in cm.needed for n in names}
        # [cost] preference: every curve summed (all 70 positions), the frequency loops widened to what it reads
        self.plan = cm.preference_plan
        self.n_angles = 0
        ang = np.zeros((1, 2 * d, nf))
        angw = np.zeros((1, 3))
        if cm.needed or self.plan is not None:
            none = np.zeros(len(cm.system.positions))
            active, angw = used_positions([cm.curve_weights[n] if self.need[n] or self.plan is not None else none
                                           for n in names])
            g = cm.system.angle_factors[active]  # (A', D, F)
            if self.plan is not None:  # positions with the same data (a mirrored file) summed once, weights added
                g, angw = _merge_alike(g, angw)
            ang = np.empty((g.shape[0], 2 * d, nf))
            ang[:, 0::2] = g.real
            ang[:, 1::2] = g.imag
            self.n_angles = int(g.shape[0])
        return ang, angw

    def _preference_rows(self, nf: int) -> list[np.ndarray]:
        """The preference's rows of ``tgt`` (in band 1 else 0; log10 f; SM's centred log10 f) and its range."""
        plan = self.plan
        self.flo = 0  # LFX's search goes down to the grid's lowest point
        self.fhi = max(self.hi, int(plan.band_stop[-1]), plan.sm_stop, plan.ref_stop, plan.lfx_top + 1)
        self.row_inband = self.row_xc + 1
        inband = np.zeros(nf)
        inband[self.lo:self.hi] = 1.0
        xc = np.zeros(nf)
        xc[plan.sm_start:plan.sm_stop] = plan.sm_xc
        return [inband, plan.log_f.copy(), xc]

    # ------------------------------------------------------------------ code

    def ir(self) -> Kernel:
        """The kernel as IR (:mod:`xo_fit.solver.ir`), built once: per candidate the frequency loop (solve,
        levels, pressures, phase chords, impedance shortfall, currents), the positions' sums, the preference,
        then the second pass (way and sum errors, roughness) and the terms."""
        if self.__dict__.get("_ir") is None:
            self._ir = self._build()
        return self._ir

    def source(self) -> str:
        """The kernel's Python text (what numba compiles; the C compiler gets the same IR printed as C)."""
        return python_text(self.ir())

    def _build(self) -> Kernel:
        cm, net = self.cm, self.net
        code = solver_code(net, currents=tuple(j for j, _, _, _ in self.judged))
        d = len(net.driver_names)
        n_peaks = sum(kind != "R" for _, _, kind, _ in self.judged)
        rows = {"e": d + 2 + n_peaks, "p": d + 3 + n_peaks,  # scratch rows of the early reflections', sound power's dB
                "v": d + 4 + n_peaks}  # the driver voltages (re, im per driver), then |p|^2 of LW, ER, SP
        rows["q"] = rows["v"] + 2 * d
        pref = self.plan is not None
        lim = self.limit_code
        assert self.scratch_rows == rows["q"] + 3 + (4 if pref else 0) + (lim.scratch_rows if lim else 0)
        angle_pre, angle_loop, angle_post = self._angle_code(code, d, rows)
        lines, peaks = self._loop_lines(code, d, rows, angle_pre)
        per_b = list(code.prep)
        per_b += [let(f8(n), 0.0) for n in ("acc_l", "acc_z", "acc_bad", "acc_e", "acc_sp")]
        per_b += [let(f8(f"acc_r{m}"), 0.0) for m, (_, _, kind, _) in enumerate(self.judged) if kind == "R"]
        per_b += lim.start_lines() if lim else []
        per_b += [let(f8(f"acc_p{j}"), 0.0) for j in range(len(cm.pairs))]
        per_b.append(loop(F, self.flo, self.fhi, lines))
        if angle_loop:
            per_b += angle_loop
            if angle_post:
                per_b.append(loop(F, self.lo, self.hi, angle_post))
        if pref:
            per_b += preference_lines(self.plan, rows["q"], self.row_inband, self.flo, self.fhi, P2F, PREF_DB)
        per_b += self._second_pass(d, rows)
        per_b += self._terms(d, peaks)
        nb, nbad = i8("nb"), i8("nbad")
        body = (let(nb, VALS.shape(0)), let(nbad, 0), loop(B, None, nb, per_b), Return(nbad))
        fn = Function("cost_kernel", (VALS, R_COEF, R_EXP, FIN, VS, RS, TAU2, TGT, ANG, ANGW, SCRATCH, OUT), body,
                      fastmath=("contract", "reassoc"))
        ways = [k for k in range(d) if cm.has_way[k]]
        return Kernel(fn, comments=("generated by xo_fit.model.fused.FusedCost; do not edit",
                                    f"kernel version {KERNEL_VERSION}; band [{self.lo}, {self.hi}); ways {ways}; "
                                    f"pairs {[(a, b) for a, b, _, _ in cm.pairs]}", *code.comment),
                      constants=(P2F, PREF_DB))

    def _angle_code(self, code, d: int, rows: dict) -> tuple[list, list, list]:
        """The off-axis positions: the voltages kept per frequency (pre), the positions summed after the
        frequency loop, position by position over frequency (unit stride: the loop vectorises), and their levels
        taken in a third pass (post)."""
        angle_pre: list = []
        angle_loop: list = []
        angle_post: list = []
        if not self.n_angles:
            return angle_pre, angle_loop, angle_post
        need, row_v, row_q = self.need, rows["v"], rows["q"]
        for k, (vr, vi) in enumerate(code.volts):
            angle_pre += [SCRATCH.store((row_v + 2 * k, F), vr), SCRATCH.store((row_v + 2 * k + 1, F), vi)]
        a = i8("a")
        v = [(SCRATCH[row_v + 2 * k, F], SCRATCH[row_v + 2 * k + 1, F]) for k in range(d)]
        qr_sum = signed_sum([t for k in range(d) for t in ((1, v[k][0] * ANG[a, 2 * k, F]),
                                                             (-1, v[k][1] * ANG[a, 2 * k + 1, F]))])
        qi_sum = total([t for k in range(d) for t in (v[k][0] * ANG[a, 2 * k + 1, F], v[k][1] * ANG[a, 2 * k, F])])
        qr, qi, q2 = f8("qr"), f8("qi"), f8("q2")
        wa = [f8(f"wa{i}") for i in range(3)]
        for first in (True, False):  # the first position sets the sums (no zeroing pass), the others add
            op = "" if first else "+"
            put = let if first else assign  # the weights are names of the candidate's block
            per_a: list = [put(wa[i], ANGW[a, i]) for i in range(3)]
            per_a.append(loop(F, self.flo, self.fhi, [
                let(qr, qr_sum), let(qi, qi_sum), let(q2, qr * qr + qi * qi),
                *[SCRATCH.store((row_q + i, F), wa[i] * q2, op) for i in range(3)]]))
            angle_loop += [let(a, 0), *per_a] if first else [loop(a, 1, self.n_angles, per_a, declare=False)]
        keep, tsys = TGT[self.row_keep, F], TGT[self.row_tsys, F]
        if need["listening_window"]:
            sd = f8("sd")
            angle_post += [let(sd, _db(SCRATCH[row_q, F])), SCRATCH.store((d, F), sd),
                           update(f8("acc_l"), keep * (sd - tsys))]
        if need["early_reflections"]:
            ed = f8("ed")
            angle_post += [let(ed, _db(SCRATCH[row_q + 1, F])), SCRATCH.store((rows["e"], F), ed),
                           update(f8("acc_e"), ed)]
        if need["sound_power"]:
            spd = f8("spd")
            angle_post += [let(spd, _db(SCRATCH[row_q + 2, F])), SCRATCH.store((rows["p"], F), spd),
                           update(f8("acc_sp"), spd)]
        return angle_pre, angle_loop, angle_post

    def _loop_lines(self, code, d: int, rows: dict, angle_pre: list) -> tuple[list, list[tuple]]:
        """The frequency loop's body after the solve: each way's pressure and level, the sum, the phase chords of
        the crossover pairs, the impedance shortfall, the rated parts' currents; and the (row, m) of the rated
        C and L parts whose maxima are taken after the loop."""
        cm = self.cm
        floor = cm.impedance_floor
        lim = self.limit_code
        inband = TGT[self.row_inband, F] if self.plan is not None else None  # band sums when the loop runs wider
        lines = list(code.loads) + list(code.body) + angle_pre
        pr = [f8(f"pr{k}") for k in range(d)]
        pi = [f8(f"pi{k}") for k in range(d)]
        for k, (vr, vi) in enumerate(code.volts):
            lines += [let(pr[k], vr * TGT[2 * k, F] - vi * TGT[2 * k + 1, F]),
                      let(pi[k], vr * TGT[2 * k + 1, F] + vi * TGT[2 * k, F]),
                      let(f8(f"pd{k}"), _db(pr[k] * pr[k] + pi[k] * pi[k])), SCRATCH.store((k, F), f8(f"pd{k}"))]
        sr, si = f8("sr"), f8("si")
        lines += [let(sr, total(pr)), let(si, total(pi))]
        if inband is not None:  # the on-axis level, whatever the sum's reference
            lines.append(SCRATCH.store((rows["q"] + 3, F), _db(sr * sr + si * si)))
        if not self.need["listening_window"]:  # else the listening window's level, after the positions are summed
            sd = f8("sd")
            lines += [let(sd, _db(sr * sr + si * si)), SCRATCH.store((d, F), sd),
                      update(f8("acc_l"), TGT[self.row_keep, F] * (sd - TGT[self.row_tsys, F]))]
        for j, (a, b, _, _) in enumerate(cm.pairs):
            base = self.row_pairs + 3 * j
            qr, qi, cr, ci = f8(f"qr{j}"), f8(f"qi{j}"), f8(f"cr{j}"), f8(f"ci{j}")
            lines += [let(qr, pr[a] * pr[b] + pi[a] * pi[b]), let(qi, pi[a] * pr[b] - pr[a] * pi[b]),
                      let(cr, qr * TGT[base + 1, F] - qi * TGT[base + 2, F]),
                      let(ci, qr * TGT[base + 2, F] + qi * TGT[base + 1, F]),
                      update(f8(f"acc_p{j}"), TGT[base, F] * (1.0 - cr / sqrt(cr * cr + ci * ci + 1e-300)))]
        if floor > 0:
            zr, zi = code.zin
            zz, sh = f8("zz"), f8("sh")
            lines += [let(zz, zr * zr + zi * zi),
                      let(sh, DB10 * ln_floored(maximum(floor * floor / maximum(zz, Z_SHORT_OHM ** 2), 1.0))),
                      update(f8("acc_z"), inband * sh * sh if inband is not None else sh * sh),
                      SCRATCH.store((d + 1, F), sh)]
        peaks: list[tuple] = []  # (scratch row, m) of the rated C and L parts: their maxima are taken after the loop
        for m, ((_j, _, kind, _), (ir_, ii)) in enumerate(zip(self.judged, code.currents)):
            qq = f8(f"qq{m}")
            lines.append(let(qq, ir_ * ir_ + ii * ii))
            if kind == "R":
                lines.append(update(f8(f"acc_r{m}"), inband * qq if inband is not None else qq))
            else:
                row = d + 2 + len(peaks)
                iw = f8("iw")
                lines.append(SCRATCH.store((row, F), qq * iw * iw if kind == "C" else qq))
                peaks.append((row, m))
        if lim:
            lines += lim.loop_lines(code, inband)
        bad = f8("bad")
        lines.append(update(f8("acc_bad"), maximum(bad, 0.0) + 0.0 * bad))
        return lines, peaks

    def _second_pass(self, d: int, rows: dict) -> list:
        """After the level is known: each way's and the sum's error, and the roughness of the off-axis curves
        about their least-squares line on log2 f (xc: log2 f less its mean)."""
        cm, need = self.cm, self.need
        level_db = cm.targets.level_db
        nb = float(self.hi - self.lo)
        level, acc_w, acc_s = f8("level"), f8("acc_w"), f8("acc_s")
        mean_e, mean_p = f8("mean_e"), f8("mean_p")
        second: list = []
        for k in (k for k in range(d) if cm.has_way[k]):
            y, x, e = f8(f"y{k}"), f8(f"x{k}"), f8(f"e{k}")
            second += [let(y, SCRATCH[k, F] - level - TGT[self.row_tway + k, F]),
                       let(x, SCRATCH[k, F] - level + BREAKUP_FLOOR_DB), assign(x, select(x > 0.0, x, 0.0)),
                       let(e, select(TGT[self.row_stop + k, F] > 0.5, x, y)), update(acc_w, e * e)]
        s, u = f8("s"), f8("u")
        second += [let(s, SCRATCH[d, F] - level - TGT[self.row_tsys, F]),
                   let(u, SCRATCH[d, F] - level - NULL_DB),  # at a null of the target: only output above it
                   assign(u, select(u > 0.0, u, 0.0)),
                   assign(s, select(TGT[self.row_keep, F] > 0.5, s, u)), update(acc_s, s * s)]
        if need["early_reflections"]:
            de = f8("de")
            second += [let(de, SCRATCH[rows["e"], F] - mean_e), update(f8("acc_ee"), de * de),
                       update(f8("acc_ex"), de * TGT[self.row_xc, F])]
        if need["sound_power"]:
            dp = f8("dp")
            second += [let(dp, SCRATCH[rows["p"], F] - mean_p), update(f8("acc_pp"), dp * dp),
                       update(f8("acc_px"), dp * TGT[self.row_xc, F])]
        return [let(level, f8("acc_l") / float(self.n_keep) if level_db is None else float(level_db)),
                let(acc_w, 0.0), let(acc_s, 0.0), let(mean_e, f8("acc_e") / nb), let(mean_p, f8("acc_sp") / nb),
                *[let(f8(n), 0.0) for n in ("acc_ee", "acc_ex", "acc_pp", "acc_px")],
                loop(F, self.lo, self.hi, second)]

    def _terms(self, d: int, peaks: list[tuple]) -> list:
        """The impedance's worst point, the stress term (each rated part's excess over its rating in dB,
        cost.stress_excess_db, squared), the terms, the weighted cost and the outputs of one candidate."""
        cm, need = self.cm, self.need
        w = cm.weights
        nb = float(self.hi - self.lo)
        lim = self.limit_code
        ways = [k for k in range(d) if cm.has_way[k]]
        mz, acc_st = f8("mz"), f8("acc_st")
        src: list = [let(mz, 0.0)]
        if cm.impedance_floor > 0:
            shv = f8("shv")
            src.append(loop(F, self.lo, self.hi, [let(shv, SCRATCH[d + 1, F]), when(shv > mz, [assign(mz, shv)])]))
        k2 = cm.drive_scale**2
        for row, m in peaks:
            mq, qv = f8(f"mq{m}"), f8("qv")
            src += [let(mq, 0.0),
                    loop(F, self.lo, self.hi, [let(qv, SCRATCH[row, F]), when(qv > mq, [assign(mq, qv)])])]
        on, n_on = switches(self.judged, self.stand_ins, src)
        src.append(let(acc_st, 0.0))
        for m, (j, _, kind, rating) in enumerate(cm.rated):
            x, mq = f8(f"x_{j}"), f8(f"mq{m}")
            if kind == "R":
                ratio = f8(f"acc_r{m}") / nb * x * k2 / (rating / 2)
            elif kind == "C":
                ratio = 2.0 * mq / (x * x) * k2 / (rating * rating)
            else:
                ratio = 2.0 * mq * k2 / (rating * rating)
            ex = f8(f"ex{m}")
            src += [let(ex, DB10 * ln_floored(maximum(ratio, 1.0))),
                    update(acc_st, select(on[m] > 0.5, ex * ex, 0.0) if on else ex * ex)]
        t = {n: f8(f"t_{n}") for n in ("stress", "way", "sum", "phase", "imp", "er", "sp", "pref")}
        phase_scale = 2 * math.degrees(1.0) ** 2 / PHASE_DEG_PER_DB**2 / max(len(cm.pairs), 1)
        sxx = self.sxx
        src += [
            let(t["stress"], (select(n_on > 0.5, acc_st / n_on, 0.0) if on else acc_st / float(len(cm.rated)))
                if cm.rated else Const(0.0)),
            let(t["way"], f8("acc_w") / float(nb * len(ways)) if ways else Const(0.0)),
            let(t["sum"], f8("acc_s") / nb),
            let(t["phase"], total([f8(f"acc_p{j}") / float(self.pair_counts[j]) for j in range(len(cm.pairs))])
                * phase_scale if cm.pairs else Const(0.0)),
            let(t["imp"], f8("acc_z") / nb + mz * mz if cm.impedance_floor > 0 else Const(0.0)),
            let(t["er"], (f8("acc_ee") - f8("acc_ex") * f8("acc_ex") / sxx) / nb if need["early_reflections"]
                else Const(0.0)),
            let(t["sp"], (f8("acc_pp") - f8("acc_px") * f8("acc_px") / sxx) / nb if need["sound_power"]
                else Const(0.0))]
        terms = [(w["way"], t["way"]), (w["sum"], t["sum"]), (w["phase"], t["phase"]), (w["impedance"], t["imp"]),
                 (w["stress"], t["stress"]), (w["early_reflections"], t["er"]), (w["sound_power"], t["sp"])]
        terms += [(w["preference"], t["pref"])] if self.plan is not None else []
        cols = [t[n] for n in ("way", "sum", "phase", "imp", "stress", "er", "sp")] + [f8("level"), f8("acc_bad")]
        cols += [t["pref"]] if self.plan is not None else []
        src.append(OUT.store((B, 0), total([wrap(c) * v for c, v in terms])))
        src += [OUT.store((B, i), v) for i, v in enumerate(cols, start=1)]
        if lim:
            src += lim.end_lines(self.judged, cm.limits.drive_scale ** 2, self.col_limits, on, n_on)
        src.append(when(Not(f8("acc_bad") <= 0.0), [update(i8("nbad"), 1)]))
        return src

    def kernel(self):
        """The compiled kernel (:func:`~xo_fit.solver.kernels.load_kernel` of :meth:`ir`), loaded on first use."""
        if self._kernel is None:
            self._kernel = load_kernel(self.ir())
        return self._kernel

    def text(self) -> str:
        """The kernel's source, generated once."""
        if self.__dict__.get("_text") is None:
            self._text = self.source()
        return self._text

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        state["_kernel"] = None
        return state

    # ------------------------------------------------------------------ evaluation

    def kernel_args(self, values: np.ndarray) -> tuple:
        """The kernel's arguments (its parameters, in order) for designs (B, P) in SI: a fresh scratch and the
        output last, shaped as :meth:`evaluate_raw` returns it."""
        v = np.ascontiguousarray(self.net.checked_values(values), dtype=float)
        k = self.net.kernel_args()
        return (v, k["r_coef"], k["r_exp"], k["fin"], float(self.net.source_voltage),
                float(self.net.source_resistance), float(PIVOT_TOLERANCE**2), self.tgt, self.ang, self.angw,
                np.empty((self.scratch_rows, self.net.frequencies.size)),
                np.empty((v.shape[0], self.col_limits + (5 if self.limit_code is not None else 0))))

    def evaluate_raw(self, values: np.ndarray) -> np.ndarray:
        """Cost, terms, level and flag of designs; rows the kernel flags are re-scored by the reference.

        Parameters
        ----------
        values : ndarray
            Part values in SI (ohm, H, F), shape (B, P) or (P,).

        Returns
        -------
        ndarray
            Shape (B, 10): the cost (dimensionless; inf where not finite), the TERMS (way, sum, phase, impedance,
            stress, early_reflections, sound_power; mean squares in dB^2), the level in dB SPL and the flag (> 0
            or NaN: re-scored); with the preference its term (column 10); with [limits] 5 columns more, the
            total violation and each limit's (:data:`xo_fit.model.limits.NAMES`), dimensionless.
        """
        args = self.kernel_args(values)
        v, out = args[0], args[-1]
        nbad = self.kernel()(*args)
        if nbad:
            self.rescore(v, np.nonzero(~(out[:, FLAG] <= 0.0))[0], out)
        bad = ~np.isfinite(out[:, 0])
        out[bad, 0] = np.inf  # as the reference: a design with a singular point is infeasible
        if self.limit_code is not None:
            c = self.col_limits
            out[bad | ~np.isfinite(out[:, c]), c] = np.inf
        return out

    def rescore(self, values: np.ndarray, redo: np.ndarray, out: np.ndarray, cm=None) -> None:
        """Rows ``redo`` of :meth:`evaluate_raw`'s ``out`` set from reference ``cm`` (default :attr:`cm`), SI values."""
        ev = (self.cm if cm is None else cm).evaluate(values[redo])
        out[redo, 0] = ev.cost
        for i, t in enumerate(TERMS, start=1):
            out[redo, i] = ev.terms.get(t, 0.0)
        out[redo, LEVEL] = ev.level_db
        if self.plan is not None:
            out[redo, PREFERENCE] = ev.terms["preference"]
        if self.limit_code is not None:
            out[redo, self.col_limits] = ev.violations["total"]
            for i, name in enumerate(NAMES, start=1):
                out[redo, self.col_limits + i] = ev.violations[name]

    def limited(self, values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Cost (B,), total violation of the [limits] (B,) and each limit's signed relative excess (B, 4; in the
        order of xo_fit.model.limits.NAMES), all dimensionless, of designs (B, P) in SI; a job with limits only."""
        raw = self.evaluate_raw(values)
        c = self.col_limits
        return raw[:, 0], raw[:, c], raw[:, c + 1:c + 1 + len(NAMES)]

    def __call__(self, values: np.ndarray) -> np.ndarray:
        """Cost (B,), dimensionless, of designs (B, P) in SI (:meth:`evaluate_raw`'s first column)."""
        return self.evaluate_raw(values)[:, 0]
