"""A driver's Thiele-Small set and box as ``check`` prints them: what was given, what follows, the box's figures."""

from __future__ import annotations

#: How each parameter is printed: (label, factor from SI, unit text, digits); None: engineering notation.
_SHOW = {"re": ("re", None, "ohm", 4), "le": ("le", None, "H", 3), "fs": ("fs", None, "Hz", 4),
         "qms": ("qms", 1.0, "", 4), "qes": ("qes", 1.0, "", 4), "qts": ("qts", 1.0, "", 4),
         "vas": ("vas", 1e3, "L", 4), "sd": ("sd", 1e4, "cm2", 4), "bl": ("bl", 1.0, "T m", 4),
         "mms": ("mms", 1e3, "g", 4), "cms": ("cms", 1e3, "mm/N", 4), "rms": ("rms", 1.0, "kg/s", 4),
         "xmax": ("xmax", 1e3, "mm", 3), "power": ("power", 1.0, "W", 4), "l2": ("l2", None, "H", 3),
         "r2": ("r2", None, "ohm", 3), "res": ("res", None, "ohm", 4), "kms": ("kms", 1.0, "N/m", 4),
         "vd": ("vd", 1e6, "cm3", 3), "eta0": ("eta0", 100.0, "%", 3), "spl_1w1m": ("1 W 1 m", 1.0, "dB SPL", 3)}


def _value(key: str, v: float) -> str:
    from xo_fit.units import format_value

    label, factor, unit, digits = _SHOW[key]
    if factor is None:
        return f"{label} {format_value(v, unit, digits)}"
    return f"{label} {v * factor:.{digits}g}" + (f" {unit}" if unit else "")


def model_lines(job, spec) -> list[str]:
    """The lines ``check`` prints of driver ``spec``'s ``[driver.NAME.ts]`` and box (none without a ts table):
    the given values, the derived ones (Small 1972), and the box's alpha, fc with Qtc (closed) or fb (vented)
    and f3."""
    from xo_fit.model.drivers import driver_model
    from xo_fit.errors import XoFitError
    from xo_fit.physics.box import alpha, closed_box, summary
    from xo_fit.units import format_value

    m = driver_model(job, spec)
    if m is None:
        return []
    ts, box = m.ts, m.box
    given = [_value(k, getattr(ts, k)) for k in _SHOW if k in ts.given]
    derived = [_value(k, v) for k, v in ts.derived().items() if k in _SHOW]
    out = [f"    ts        given: {', '.join(given)}", f"    {'':<9} derived: {', '.join(derived)}"]
    if ts.vas is None:
        out.append(f"    {'':<9} no vas (nor sd with a scale of the moving system): no box model, no excursion")
        return out
    try:
        s = summary(ts, box, key=f"[driver.{spec.name}.box]")
        f3 = f"f3 {format_value(s['f3'], 'Hz', 3)}"
    except XoFitError as e:  # a response that never crosses -3 dB near fs (a strongly peaked alignment)
        s = {"alpha": alpha(ts, box)}
        if box.kind == "closed":
            assert box.volume is not None  # a closed box has its volume
            s["fc"], s["qtc"] = closed_box(ts, box.volume)
        else:
            s["h"] = (box.tuning or 0) / ts.fs
        f3 = f"f3 undetermined ({e.message})"
    if box.kind == "closed":
        assert box.volume is not None  # a closed box has its volume
        what = (f"closed, {box.volume * 1e3:.4g} L: alpha {s['alpha']:.3g}, fc {format_value(s['fc'], 'Hz', 3)}, "
                f"Qtc {s['qtc']:.3g}, {f3} (Small 1972)")
    elif box.kind == "vented":
        assert box.volume is not None and box.tuning is not None  # a vented box has both
        what = (f"vented, {box.volume * 1e3:.4g} L tuned to {format_value(box.tuning, 'Hz', 3)}, QL {box.ql:g}: "
                f"alpha {s['alpha']:.3g}, h = fb/fs {s['h']:.3g}, {f3} (Small 1973)")
    else:
        what = f"none (an infinite baffle): {f3}"
    out.append(f"    box       {what}")
    if not m.moves and ts.xmax is not None:
        out.append(f"    {'':<9} the cone's motion needs sd and a scale: no excursion against xmax")
    return out
