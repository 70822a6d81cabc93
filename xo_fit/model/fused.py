"""The fused kernel: solve the network and reduce the cost terms in one compiled pass per candidate.

A fit spends nearly all of its time evaluating the cost of candidate designs.
Computing dB curves in numpy costs several microseconds per candidate, far
more than the solve; this kernel instead extends the solver's straight-line
code (:func:`xo_fit.solver.codegen.solver_code`) with each driver's pressure, the
complex sum, their levels in dB (through :func:`xo_fit.solver.vecmath.ln`, which
vectorises), the phase chords through the crossover regions and the impedance
shortfall, and reduces them over the band inside the frequency loop. The
terms are exactly those of :class:`xo_fit.model.cost.CostModel` (the reference
implementation, against which tests hold this kernel to 1e-9).

The structure of the cost (which drivers have way targets, which pairs meet
at a crossover, the band's index range, a fixed or automatic level, the
weights) is written into the generated code as constants; the curves are
passed as one array ``tgt``. The kernel is compiled with ``reassoc`` as well
as ``contract``: LLVM vectorises floating-point sums over the frequency loop
only when it may reorder them. Candidates with a flagged point (a pivot too
small, a NaN) are re-scored by the reference path.
"""

from __future__ import annotations

import math

import numpy as np

from xo_fit.constants import P_REF, PIVOT_TOLERANCE, SPL_FLOOR_DB, Z_SHORT_OHM
from xo_fit.model.acoustics import used_positions
from xo_fit.model.cost import BREAKUP_FLOOR_DB, NULL_DB, PHASE_DEG_PER_DB, TERMS
from xo_fit.model.limits import NAMES
from xo_fit.model.fused_preference import preference_lines
from xo_fit.solver.codegen import solver_code
from xo_fit.solver.standalone import COST_SIGNATURE
from xo_fit.solver.kernels import KERNEL_VERSION, load_kernel

#: |p|^2 floor (Pa^2) matching SPL_FLOOR_DB: levels below it read as the floor.
_P2_FLOOR = (P_REF * 10 ** (SPL_FLOOR_DB / 20)) ** 2
_PREF_DB = 20 * math.log10(P_REF)
#: Columns of evaluate_raw's output: cost, the terms, then the level and the flag; with [cost] preference, the
#: preference term after them; with [limits], the total violation and each limit's (xo_fit.model.limits.NAMES)
#: after those (a job without them keeps the kernel it had).
LEVEL = 1 + len(TERMS)
FLAG = LEVEL + 1
PREFERENCE = FLAG + 1


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
    """Cost of batches of designs through one generated kernel; same numbers as CostModel.evaluate."""

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

    def source(self) -> str:
        """The kernel's Python source (the subset :mod:`xo_fit.solver.ctranslate` writes as C): per candidate
        the frequency loop (solve, levels, pressures, phase chords, impedance shortfall, currents), the
        positions' sums, the preference, then the second pass (way and sum errors, roughness) and the terms."""
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
        i1, i2 = " " * 8, " " * 12
        src = self._header(code)
        src += [i1 + s for s in code.prep]
        src += [i1 + "acc_l = 0.0", i1 + "acc_z = 0.0", i1 + "acc_bad = 0.0", i1 + "acc_e = 0.0", i1 + "acc_sp = 0.0"]
        src += [i1 + f"acc_r{m} = 0.0" for m, (_, _, kind, _) in enumerate(self.judged) if kind == "R"]
        src += [i1 + s for s in (lim.start_lines() if lim else [])]
        src += [i1 + f"acc_p{j} = 0.0" for j in range(len(cm.pairs))]
        src += [i1 + f"for f in range({self.flo}, {self.fhi}):"] + [i2 + s for s in lines]
        if angle_loop:
            src += [i1 + s for s in angle_loop]
            if angle_post:
                src += [i1 + f"for f in range({self.lo}, {self.hi}):"] + [i2 + s for s in angle_post]
        if pref:
            src += [i1 + s for s in self._preference_source(rows["q"])]
        src += self._second_pass(d, rows)
        src += self._terms(d, peaks)
        return "\n".join(src) + "\n"

    def _header(self, code) -> list[str]:
        """The module's head and the kernel's signature, down to the candidate loop."""
        cm = self.cm
        ways = [k for k in range(len(self.net.driver_names)) if cm.has_way[k]]
        return [
            "# generated by xo_fit.fused.FusedCost.source; do not edit",
            f"# kernel version {KERNEL_VERSION}; band [{self.lo}, {self.hi}); ways {ways}; "
            f"pairs {[(a, b) for a, b, _, _ in cm.pairs]}",
            *code.comment,
            "import numba",
            "from math import sqrt",
            "from xo_fit.solver.vecmath import ln, ln_floored, DB10",
            "",
            f"P2F = {_P2_FLOOR!r}",
            f"PREF_DB = {_PREF_DB!r}",
            "",
            "",
            '@numba.njit(cache=True, error_model="numpy", fastmath={"contract", "reassoc"}, nogil=True)',
            "def cost_kernel(vals, r_coef, r_exp, fin, vs, rs, tau2, tgt, ang, angw, scratch, out):",
            "    nb = vals.shape[0]",
            "    nbad = 0",
            "    for b in range(nb):",
        ]

    def _angle_code(self, code, d: int, rows: dict) -> tuple[list[str], list[str], list[str]]:
        """The off-axis positions: the voltages kept per frequency (pre), the positions summed after the
        frequency loop, position by position over frequency (unit stride: the loop vectorises), and their levels
        taken in a third pass (post)."""
        angle_pre: list[str] = []
        angle_loop: list[str] = []
        angle_post: list[str] = []
        if not self.n_angles:
            return angle_pre, angle_loop, angle_post
        need, row_v, row_q = self.need, rows["v"], rows["q"]
        for k, (vr, vi) in enumerate(code.volts):
            angle_pre += [f"scratch[{row_v + 2 * k}, f] = {vr}", f"scratch[{row_v + 2 * k + 1}, f] = {vi}"]
        qr = " + ".join(f"scratch[{row_v + 2 * k}, f] * ang[a, {2 * k}, f] - scratch[{row_v + 2 * k + 1}, f] * "
                        f"ang[a, {2 * k + 1}, f]" for k in range(d))
        qi = " + ".join(f"scratch[{row_v + 2 * k}, f] * ang[a, {2 * k + 1}, f] + scratch[{row_v + 2 * k + 1}, f] * "
                        f"ang[a, {2 * k}, f]" for k in range(d))
        for first in (True, False):  # the first position sets the sums (no zeroing pass), the others add
            op = "=" if first else "+="
            angle_loop += [("a = 0" if first else f"for a in range(1, {self.n_angles}):")]
            ind = "" if first else "    "
            angle_loop += [ind + "wa0 = angw[a, 0]", ind + "wa1 = angw[a, 1]", ind + "wa2 = angw[a, 2]",
                           ind + f"for f in range({self.flo}, {self.fhi}):", ind + f"    qr = {qr}",
                           ind + f"    qi = {qi}", ind + "    q2 = qr * qr + qi * qi",
                           ind + f"    scratch[{row_q}, f] {op} wa0 * q2",
                           ind + f"    scratch[{row_q + 1}, f] {op} wa1 * q2",
                           ind + f"    scratch[{row_q + 2}, f] {op} wa2 * q2"]
        if need["listening_window"]:
            angle_post += [f"sd = DB10 * ln_floored(max(scratch[{row_q}, f], P2F)) - PREF_DB", f"scratch[{d}, f] = sd",
                           f"acc_l += tgt[{self.row_keep}, f] * (sd - tgt[{self.row_tsys}, f])"]
        if need["early_reflections"]:
            angle_post += [f"ed = DB10 * ln_floored(max(scratch[{row_q + 1}, f], P2F)) - PREF_DB",
                           f"scratch[{rows['e']}, f] = ed", "acc_e += ed"]
        if need["sound_power"]:
            angle_post += [f"spd = DB10 * ln_floored(max(scratch[{row_q + 2}, f], P2F)) - PREF_DB",
                           f"scratch[{rows['p']}, f] = spd", "acc_sp += spd"]
        return angle_pre, angle_loop, angle_post

    def _loop_lines(self, code, d: int, rows: dict, angle_pre: list[str]) -> tuple[list[str], list[tuple]]:
        """The frequency loop's body after the solve: each way's pressure and level, the sum, the phase chords of
        the crossover pairs, the impedance shortfall, the rated parts' currents; and the (row, m) of the rated
        C and L parts whose maxima are taken after the loop."""
        cm = self.cm
        floor = cm.impedance_floor
        pref = self.plan is not None
        lim = self.limit_code
        inband = f"tgt[{self.row_inband}, f] * " if pref else ""  # the band's sums, when the loop runs wider
        lines = list(code.loads) + list(code.body) + angle_pre
        for k, (vr, vi) in enumerate(code.volts):
            lines += [f"pr{k} = {vr} * tgt[{2 * k}, f] - {vi} * tgt[{2 * k + 1}, f]",
                      f"pi{k} = {vr} * tgt[{2 * k + 1}, f] + {vi} * tgt[{2 * k}, f]",
                      f"pd{k} = DB10 * ln_floored(max(pr{k} * pr{k} + pi{k} * pi{k}, P2F)) - PREF_DB",
                      f"scratch[{k}, f] = pd{k}"]
        lines += [f"sr = {' + '.join(f'pr{k}' for k in range(d))}", f"si = {' + '.join(f'pi{k}' for k in range(d))}"]
        if pref:  # the on-axis level, whatever the sum's reference
            lines += [f"scratch[{rows['q'] + 3}, f] = DB10 * ln_floored(max(sr * sr + si * si, P2F)) - PREF_DB"]
        if not self.need["listening_window"]:  # else the listening window's level, after the positions are summed
            lines += ["sd = DB10 * ln_floored(max(sr * sr + si * si, P2F)) - PREF_DB", f"scratch[{d}, f] = sd",
                      f"acc_l += tgt[{self.row_keep}, f] * (sd - tgt[{self.row_tsys}, f])"]
        for j, (a, b, _, _) in enumerate(cm.pairs):
            base = self.row_pairs + 3 * j
            lines += [f"qr{j} = pr{a} * pr{b} + pi{a} * pi{b}", f"qi{j} = pi{a} * pr{b} - pr{a} * pi{b}",
                      f"cr{j} = qr{j} * tgt[{base + 1}, f] - qi{j} * tgt[{base + 2}, f]",
                      f"ci{j} = qr{j} * tgt[{base + 2}, f] + qi{j} * tgt[{base + 1}, f]",
                      f"acc_p{j} += tgt[{base}, f] * (1.0 - cr{j} / sqrt(cr{j} * cr{j} + ci{j} * ci{j} + 1e-300))"]
        if floor > 0:
            zr, zi = code.zin
            lines += [f"zz = {zr} * {zr} + {zi} * {zi}",
                      f"sh = DB10 * ln_floored(max({floor * floor!r} / max(zz, {Z_SHORT_OHM ** 2!r}), 1.0))",
                      f"acc_z += {inband}sh * sh", f"scratch[{d + 1}, f] = sh"]
        peaks: list[tuple] = []  # (scratch row, m) of the rated C and L parts: their maxima are taken after the loop
        for m, ((_j, _, kind, _), (ir, ii)) in enumerate(zip(self.judged, code.currents)):
            lines.append(f"qq{m} = {ir} * {ir} + {ii} * {ii}")
            if kind == "R":
                lines.append(f"acc_r{m} += {inband}qq{m}")
            else:
                row = d + 2 + len(peaks)
                lines.append(f"scratch[{row}, f] = qq{m} * iw * iw" if kind == "C" else f"scratch[{row}, f] = qq{m}")
                peaks.append((row, m))
        if lim:
            lines += lim.loop_lines(code, inband)
        lines += ["acc_bad += max(bad, 0.0) + 0.0 * bad"]
        return lines, peaks

    def _second_pass(self, d: int, rows: dict) -> list[str]:
        """After the level is known: each way's and the sum's error, and the roughness of the off-axis curves
        about their least-squares line on log2 f (xc: log2 f less its mean)."""
        cm, need = self.cm, self.need
        level = cm.targets.level_db
        nb = self.hi - self.lo
        i1, i2 = " " * 8, " " * 12
        second = []
        for k in (k for k in range(d) if cm.has_way[k]):
            second += [f"y{k} = scratch[{k}, f] - level - tgt[{self.row_tway + k}, f]",
                       f"x{k} = scratch[{k}, f] - level + {BREAKUP_FLOOR_DB!r}",
                       f"x{k} = x{k} if x{k} > 0.0 else 0.0",
                       f"e{k} = x{k} if tgt[{self.row_stop + k}, f] > 0.5 else y{k}",
                       f"acc_w += e{k} * e{k}"]
        second += [f"s = scratch[{d}, f] - level - tgt[{self.row_tsys}, f]",
                   f"u = scratch[{d}, f] - level - {NULL_DB!r}",  # at a null of the target: only output above it
                   "u = u if u > 0.0 else 0.0",
                   f"s = s if tgt[{self.row_keep}, f] > 0.5 else u", "acc_s += s * s"]
        if need["early_reflections"]:
            second += [f"de = scratch[{rows['e']}, f] - mean_e", "acc_ee += de * de",
                       f"acc_ex += de * tgt[{self.row_xc}, f]"]
        if need["sound_power"]:
            second += [f"dp = scratch[{rows['p']}, f] - mean_p", "acc_pp += dp * dp",
                       f"acc_px += dp * tgt[{self.row_xc}, f]"]
        return ([i1 + (f"level = acc_l / {self.n_keep}.0" if level is None else f"level = {level!r}"),
                 i1 + "acc_w = 0.0", i1 + "acc_s = 0.0", i1 + f"mean_e = acc_e / {nb}.0",
                 i1 + f"mean_p = acc_sp / {nb}.0", i1 + "acc_ee = 0.0", i1 + "acc_ex = 0.0", i1 + "acc_pp = 0.0",
                 i1 + "acc_px = 0.0"]
                + [i1 + f"for f in range({self.lo}, {self.hi}):"] + [i2 + s for s in second])

    def _terms(self, d: int, peaks: list[tuple]) -> list[str]:
        """The impedance's worst point, the stress term (each rated part's excess over its rating in dB,
        cost.stress_excess_db, squared), the terms, the weighted cost and the outputs of one candidate."""
        cm, need = self.cm, self.need
        floor = cm.impedance_floor
        w = cm.weights
        nb = self.hi - self.lo
        pref = self.plan is not None
        lim = self.limit_code
        ways = [k for k in range(d) if cm.has_way[k]]
        i1, i2, i3 = " " * 8, " " * 12, " " * 16
        src = [i1 + "mz = 0.0"]
        if floor > 0:
            src += [i1 + f"for f in range({self.lo}, {self.hi}):", i2 + f"shv = scratch[{d + 1}, f]",
                    i2 + "if shv > mz:", i3 + "mz = shv"]
        k2 = cm.drive_scale**2
        for row, m in peaks:
            src += [i1 + f"mq{m} = 0.0", i1 + f"for f in range({self.lo}, {self.hi}):",
                    i2 + f"qv = scratch[{row}, f]", i2 + f"if qv > mq{m}:", i3 + f"mq{m} = qv"]
        src.append(i1 + "acc_st = 0.0")
        for m, (j, _, kind, rating) in enumerate(cm.rated):
            if kind == "R":
                ratio = f"acc_r{m} / {nb}.0 * x_{j} * {k2!r} / {rating / 2!r}"
            elif kind == "C":
                ratio = f"2.0 * mq{m} / (x_{j} * x_{j}) * {k2!r} / {rating * rating!r}"
            else:
                ratio = f"2.0 * mq{m} * {k2!r} / {rating * rating!r}"
            src += [i1 + f"ex{m} = DB10 * ln_floored(max({ratio}, 1.0))", i1 + f"acc_st += ex{m} * ex{m}"]
        src.append(i1 + (f"t_stress = acc_st / {len(cm.rated)}.0" if cm.rated else "t_stress = 0.0"))
        phase_expr = " + ".join(f"acc_p{j} / {self.pair_counts[j]}.0" for j in range(len(cm.pairs)))
        phase_scale = 2 * math.degrees(1.0) ** 2 / PHASE_DEG_PER_DB**2 / max(len(cm.pairs), 1)
        src += [
            i1 + (f"t_way = acc_w / {nb * len(ways)}.0" if ways else "t_way = 0.0"),
            i1 + f"t_sum = acc_s / {nb}.0",
            i1 + (f"t_phase = ({phase_expr}) * {phase_scale!r}" if cm.pairs else "t_phase = 0.0"),
            i1 + (f"t_imp = acc_z / {nb}.0 + mz * mz" if floor > 0 else "t_imp = 0.0"),
            i1 + (f"t_er = (acc_ee - acc_ex * acc_ex / {self.sxx!r}) / {nb}.0" if need["early_reflections"]
                  else "t_er = 0.0"),
            i1 + (f"t_sp = (acc_pp - acc_px * acc_px / {self.sxx!r}) / {nb}.0" if need["sound_power"]
                  else "t_sp = 0.0"),
            i1 + f"out[b, 0] = {w['way']!r} * t_way + {w['sum']!r} * t_sum + {w['phase']!r} * t_phase "
                 f"+ {w['impedance']!r} * t_imp + {w['stress']!r} * t_stress + {w['early_reflections']!r} * t_er "
                 f"+ {w['sound_power']!r} * t_sp" + (f" + {w['preference']!r} * t_pref" if pref else ""),
            i1 + "out[b, 1] = t_way", i1 + "out[b, 2] = t_sum", i1 + "out[b, 3] = t_phase", i1 + "out[b, 4] = t_imp",
            i1 + "out[b, 5] = t_stress", i1 + "out[b, 6] = t_er", i1 + "out[b, 7] = t_sp",
            i1 + f"out[b, {LEVEL}] = level", i1 + f"out[b, {FLAG}] = acc_bad",
            *([i1 + f"out[b, {PREFERENCE}] = t_pref"] if pref else []),
            *([i1 + s for s in lim.end_lines(self.judged, cm.limits.drive_scale ** 2, self.col_limits)] if lim else []),
            i1 + "if not acc_bad <= 0.0:", i2 + "nbad += 1",
            "    return nbad",
        ]
        return src

    def _preference_source(self, row_q: int) -> list[str]:
        """Per candidate, after the position sums: Olive's score (:func:`~xo_fit.model.fused_preference.
        preference_lines`) and the term max(0, 10 - score)^2 / 100 as ``t_pref``."""
        return preference_lines(self.plan, row_q, self.row_inband, self.flo, self.fhi)

    def kernel(self):
        if self._kernel is None:
            self._kernel = load_kernel(self.text(), entry="cost_kernel", signature=COST_SIGNATURE)
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
        """The kernel's arguments (COST_SIGNATURE) for designs (B, P): a fresh scratch and output (B, 10) last."""
        v = np.ascontiguousarray(self.net._check_values(values), dtype=float)
        k = self.net._kernel_args()
        return (v, k["r_coef"], k["r_exp"], k["fin"], float(self.net.source_voltage),
                float(self.net.source_resistance), float(PIVOT_TOLERANCE**2), self.tgt, self.ang, self.angw,
                np.empty((self.scratch_rows, self.net.frequencies.size)),
                np.empty((v.shape[0], self.col_limits + (5 if self.limit_code is not None else 0))))

    def evaluate_raw(self, values: np.ndarray) -> np.ndarray:
        """(B, 10): cost, the TERMS (way, sum, phase, impedance, stress, early_reflections, sound_power), level,
        flag for designs (B, P); flagged rows re-scored."""
        args = self.kernel_args(values)
        v, out = args[0], args[-1]
        nbad = self.kernel()(*args)
        if nbad:
            redo = np.nonzero(~(out[:, FLAG] <= 0.0))[0]
            ev = self.cm.evaluate(v[redo])
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
        bad = ~np.isfinite(out[:, 0])
        out[bad, 0] = np.inf  # as the reference: a design with a singular point is infeasible
        if self.limit_code is not None:
            c = self.col_limits
            out[bad | ~np.isfinite(out[:, c]), c] = np.inf
        return out

    def limited(self, values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Cost (B,), total violation of the [limits] (B,) and each limit's signed excess (B, 4; in the order of
        xo_fit.model.limits.NAMES) of designs (B, P); a job with limits only."""
        raw = self.evaluate_raw(values)
        c = self.col_limits
        return raw[:, 0], raw[:, c], raw[:, c + 1:c + 1 + len(NAMES)]

    def __call__(self, values: np.ndarray) -> np.ndarray:
        """Cost (B,) of designs (B, P)."""
        return self.evaluate_raw(values)[:, 0]
