"""The predicted preference (S. E. Olive's score) as statements of the fused cost kernel: the same arithmetic as
:func:`xo_fit.model.preference.evaluate` with ``bound_lfx=True``, over the plan's precomputed index ranges."""

from __future__ import annotations

from xo_fit.model.cta2034 import IN_ROOM_WEIGHTS
from xo_fit.model.preference import (COEF_LFX, COEF_NBD_ON, COEF_NBD_PIR, COEF_SM_PIR, FLAT_RMS_DB, INTERCEPT,
                                     LFX_DROP_DB)
from xo_fit.solver.codegen import F
from xo_fit.solver.ir import (DB10, Array, Declared, Named, absolute, assign, f8, i8, let, ln, loop, maximum, select,
                              update, when)

#: The fused kernel's arrays and constants these statements read (xo_fit.model.fused).
TGT, SCRATCH = Array("tgt", 2), Array("scratch", 2)


def preference_lines(plan, row_q: int, row_inband: int, flo: int, fhi: int, p2f: Named, pref_db: Named) -> list:
    """Per candidate, after the position sums: Olive's score from the on-axis, listening window, early
    reflections and sound power sums and the term max(0, 10 - score)^2 / 100 as ``t_pref``. Its names start
    with ``pf_`` (apart from the solver's).

    Parameters
    ----------
    plan : PreferencePlan
        The score's index ranges on the grid (:class:`xo_fit.model.preference.PreferencePlan`).
    row_q : int
        The first of the ``scratch`` rows it reads and writes (an index, dimensionless): the listening
        window's, early reflections' and sound power's |p|^2 sums in Pa^2 (rows ``row_q`` to ``row_q + 2``),
        the on-axis level in dB (``row_q + 3``); it writes the listening window's, sound power's and in-room
        levels in dB to rows ``row_q + 4`` to ``row_q + 6``.
    row_inband : int
        The ``tgt`` row of the band's indicator (an index, dimensionless); ``row_inband + 1`` holds log10 f,
        ``row_inband + 2`` SM's centred log10 f.
    flo, fhi : int
        The grid's index range [flo, fhi) the levels are taken over (indices, dimensionless).
    p2f : Named
        The kernel's |p|^2 floor constant, in Pa^2.
    pref_db : Named
        The kernel's constant 20 log10(20 uPa / 1 Pa), about -94, in dB: a level in dB SPL is
        10 log10(|p|^2) less it.

    Returns
    -------
    list of Stmt
        The statements, setting ``t_pref`` (dimensionless).
    """
    r_on, r_lw, r_sp, r_pir = row_q + 3, row_q + 4, row_q + 5, row_q + 6
    r_logf, r_smx = row_inband + 1, row_inband + 2
    a, b, c = IN_ROOM_WEIGHTS
    v = {n: f8("pf_" + n) for n in ("ql", "qe", "qs", "non", "npir", "so", "sq", "mo", "mq", "ao", "aq", "sy", "my",
                                     "sxy", "syy", "dy", "sm", "sl", "thr", "hit", "lfx", "yi", "score", "short")}
    pf_i, pf_j = i8("pf_i"), i8("pf_j")
    here = Declared()  # names of the candidate's block, set again and again
    # levels of the listening window, the sound power and the in-room mix (each curve floored as power_db)
    out = [loop(F, flo, fhi, [
        let(v["ql"], maximum(SCRATCH[row_q, F], p2f)), let(v["qe"], maximum(SCRATCH[row_q + 1, F], p2f)),
        let(v["qs"], maximum(SCRATCH[row_q + 2, F], p2f)),
        SCRATCH.store((r_lw, F), DB10 * ln(v["ql"]) - pref_db), SCRATCH.store((r_sp, F), DB10 * ln(v["qs"]) - pref_db),
        SCRATCH.store((r_pir, F), DB10 * ln(a * v["ql"] + b * v["qe"] + c * v["qs"]) - pref_db)]),
        here.set(v["non"], 0.0), here.set(v["npir"], 0.0)]
    # NBD: each half-octave band's mean absolute deviation from its own mean, on axis and in room
    for s, e in zip(plan.band_start.tolist(), plan.band_stop.tolist()):
        n = float(e - s)
        out += [here.set(v["so"], 0.0), here.set(v["sq"], 0.0),
                loop(F, s, e, [update(v["so"], SCRATCH[r_on, F]), update(v["sq"], SCRATCH[r_pir, F])]),
                here.set(v["mo"], v["so"] / n), here.set(v["mq"], v["sq"] / n), here.set(v["ao"], 0.0),
                here.set(v["aq"], 0.0),
                loop(F, s, e, [update(v["ao"], absolute(SCRATCH[r_on, F] - v["mo"])),
                               update(v["aq"], absolute(SCRATCH[r_pir, F] - v["mq"]))]),
                update(v["non"], v["ao"] / n), update(v["npir"], v["aq"] / n)]
    nb = float(plan.band_start.size)
    out += [here.set(v["non"], v["non"] / nb), here.set(v["npir"], v["npir"] / nb)]
    # SM: r^2 of the in-room response's straight line on log10 f (centred abscissae in tgt)
    s, e = plan.sm_start, plan.sm_stop
    out += [let(v["sy"], 0.0), loop(F, s, e, [update(v["sy"], SCRATCH[r_pir, F])]),
            let(v["my"], v["sy"] / float(e - s)), let(v["sxy"], 0.0), let(v["syy"], 0.0),
            loop(F, s, e, [let(v["dy"], SCRATCH[r_pir, F] - v["my"]), update(v["sxy"], v["dy"] * TGT[r_smx, F]),
                           update(v["syy"], v["dy"] * v["dy"])]),
            let(v["sm"], select(v["syy"] <= (e - s) * FLAT_RMS_DB ** 2, 0.0,
                                v["sxy"] * v["sxy"] / (plan.sm_sxx * v["syy"])))]
    # LFX: the highest point at or under 300 Hz where the sound power is 6 dB under the listening window's
    # mean (300 Hz..10 kHz), interpolated in log f with the point above; none: the grid's lowest frequency
    s, e, top = plan.ref_start, plan.ref_stop, plan.lfx_top
    out += [let(v["sl"], 0.0), loop(F, s, e, [update(v["sl"], SCRATCH[r_lw, F])]),
            let(v["thr"], v["sl"] / float(e - s) - LFX_DROP_DB), let(pf_i, 0), let(v["hit"], 0.0),
            loop(F, 0, top + 1, [when(SCRATCH[r_sp, F] <= v["thr"], [assign(pf_i, F), assign(v["hit"], 1.0)])]),
            # (a found flag, not a -1 sentinel: an index must be provably >= 0)
            let(v["lfx"], TGT[r_logf, 0]),
            when(v["hit"] > 0.5, [
                let(pf_j, select(pf_i < top, pf_i + 1, pf_i)), assign(v["lfx"], TGT[r_logf, pf_i]),
                when(pf_j > pf_i, [
                    let(v["yi"], SCRATCH[r_sp, pf_i]),
                    assign(v["lfx"], v["lfx"] + (v["thr"] - v["yi"]) / (SCRATCH[r_sp, pf_j] - v["yi"])
                           * (TGT[r_logf, pf_j] - v["lfx"]))])]),
            let(v["score"], INTERCEPT - COEF_NBD_ON * v["non"] - COEF_NBD_PIR * v["npir"] - COEF_LFX * v["lfx"]
                + COEF_SM_PIR * v["sm"]),
            let(v["short"], 10.0 - v["score"]), assign(v["short"], select(v["short"] > 0.0, v["short"], 0.0)),
            let(f8("t_pref"), v["short"] * v["short"] / 100.0)]
    return out
