"""The predicted preference (S. E. Olive's score) as lines of the fused cost kernel: the same arithmetic as
:func:`xo_fit.model.preference.evaluate` with ``bound_lfx=True``, over the plan's precomputed index ranges."""

from __future__ import annotations

from xo_fit.model.cta2034 import IN_ROOM_WEIGHTS
from xo_fit.model.preference import (COEF_LFX, COEF_NBD_ON, COEF_NBD_PIR, COEF_SM_PIR, FLAT_RMS_DB, INTERCEPT,
                                     LFX_DROP_DB)


def preference_lines(plan, row_q: int, row_inband: int, flo: int, fhi: int) -> list[str]:
    """Per candidate, after the position sums: Olive's score from the on-axis, listening window, early
    reflections and sound power sums (``scratch`` rows from ``row_q``) and the term max(0, 10 - score)^2 / 100
    as ``t_pref``. Its names start with ``pf_`` (apart from the solver's); ``tgt`` row ``row_inband + 1`` holds
    log10 f, ``row_inband + 2`` SM's centred log10 f."""
    r_on, r_lw, r_sp, r_pir = row_q + 3, row_q + 4, row_q + 5, row_q + 6
    r_logf, r_smx = row_inband + 1, row_inband + 2
    a, b, c = IN_ROOM_WEIGHTS
    i1, i2 = " " * 4, " " * 8
    # levels of the listening window, the sound power and the in-room mix (each curve floored as power_db)
    out = [f"for f in range({flo}, {fhi}):",
           i1 + f"pf_ql = max(scratch[{row_q}, f], P2F)", i1 + f"pf_qe = max(scratch[{row_q + 1}, f], P2F)",
           i1 + f"pf_qs = max(scratch[{row_q + 2}, f], P2F)",
           i1 + f"scratch[{r_lw}, f] = DB10 * ln(pf_ql) - PREF_DB",
           i1 + f"scratch[{r_sp}, f] = DB10 * ln(pf_qs) - PREF_DB",
           i1 + f"scratch[{r_pir}, f] = DB10 * ln({a!r} * pf_ql + {b!r} * pf_qe + {c!r} * pf_qs) - PREF_DB",
           "pf_non = 0.0", "pf_npir = 0.0"]
    # NBD: each half-octave band's mean absolute deviation from its own mean, on axis and in room
    for s, e in zip(plan.band_start.tolist(), plan.band_stop.tolist()):
        n = f"{e - s}.0"
        out += ["pf_so = 0.0", "pf_sq = 0.0", f"for f in range({s}, {e}):",
            i1 + f"pf_so += scratch[{r_on}, f]", i1 + f"pf_sq += scratch[{r_pir}, f]",
            f"pf_mo = pf_so / {n}", f"pf_mq = pf_sq / {n}", "pf_ao = 0.0", "pf_aq = 0.0",
            f"for f in range({s}, {e}):", i1 + f"pf_ao += abs(scratch[{r_on}, f] - pf_mo)",
            i1 + f"pf_aq += abs(scratch[{r_pir}, f] - pf_mq)",
            f"pf_non += pf_ao / {n}", f"pf_npir += pf_aq / {n}"]
    nb = f"{plan.band_start.size}.0"
    out += [f"pf_non = pf_non / {nb}", f"pf_npir = pf_npir / {nb}"]
    # SM: r^2 of the in-room response's straight line on log10 f (centred abscissae in tgt)
    s, e = plan.sm_start, plan.sm_stop
    out += ["pf_sy = 0.0", f"for f in range({s}, {e}):", i1 + f"pf_sy += scratch[{r_pir}, f]",
        f"pf_my = pf_sy / {e - s}.0", "pf_sxy = 0.0", "pf_syy = 0.0", f"for f in range({s}, {e}):",
        i1 + f"pf_dy = scratch[{r_pir}, f] - pf_my", i1 + f"pf_sxy += pf_dy * tgt[{r_smx}, f]",
        i1 + "pf_syy += pf_dy * pf_dy",
        f"pf_sm = 0.0 if pf_syy <= {(e - s) * FLAT_RMS_DB ** 2!r} else "
        f"pf_sxy * pf_sxy / ({plan.sm_sxx!r} * pf_syy)"]
    # LFX: the highest point at or under 300 Hz where the sound power is 6 dB under the listening window's
    # mean (300 Hz..10 kHz), interpolated in log f with the point above; none: the grid's lowest frequency
    s, e, top = plan.ref_start, plan.ref_stop, plan.lfx_top
    out += ["pf_sl = 0.0", f"for f in range({s}, {e}):", i1 + f"pf_sl += scratch[{r_lw}, f]",
        f"pf_thr = pf_sl / {e - s}.0 - {LFX_DROP_DB!r}", "pf_i = 0", "pf_hit = 0.0",
        f"for f in range(0, {top + 1}):",
        i1 + f"if scratch[{r_sp}, f] <= pf_thr:", i2 + "pf_i = f", i2 + "pf_hit = 1.0",
        # (a found flag, not a -1 sentinel: the C translation refuses an index it cannot prove >= 0)
        f"pf_lfx = tgt[{r_logf}, 0]", "if pf_hit > 0.5:", i1 + f"pf_j = pf_i + 1 if pf_i < {top} else pf_i",
        i1 + f"pf_lfx = tgt[{r_logf}, pf_i]", i1 + "if pf_j > pf_i:",
        i2 + f"pf_yi = scratch[{r_sp}, pf_i]",
        i2 + f"pf_lfx = pf_lfx + (pf_thr - pf_yi) / (scratch[{r_sp}, pf_j] - pf_yi) * "
             f"(tgt[{r_logf}, pf_j] - pf_lfx)",
        f"pf_score = {INTERCEPT!r} - {COEF_NBD_ON!r} * pf_non - {COEF_NBD_PIR!r} * pf_npir "
        f"- {COEF_LFX!r} * pf_lfx + {COEF_SM_PIR!r} * pf_sm",
        "pf_short = 10.0 - pf_score", "pf_short = pf_short if pf_short > 0.0 else 0.0",
        "t_pref = pf_short * pf_short / 100.0"]
    return out

