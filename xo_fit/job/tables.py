"""The job's tables other than [[part]]: grid, drivers and their angles, target and ways, cost, search, snap, spread,
stress."""

from __future__ import annotations

from collections.abc import Mapping
import math
import re
from pathlib import Path

import numpy as np

from xo_fit.errors import XoFitError
from xo_fit.grid import Grid
from xo_fit.units import UnitsError, parse_percent, parse_value
from xo_fit.job.model import (is_name, OHMS, OFFSET_M, POWER_W, DEFAULTS, GRID_HZ, MAX_POINTS, MAX_WEIGHT, NAME_PATTERN,
                              FileCurve, FlatResponse, SplicedResponse, Resistive, ThieleSmall, AngleSpec, position,
                              DriverSpec)
from xo_fit.job.settings import (FrozenMap, WayTarget, TargetSpec, CostSpec, SearchSpec, SnapSpec, SpreadSpec,
                                 StressSpec)
from xo_fit.job.model import TS_UNITS, BoxSpec, ModelImpedance
from xo_fit.job.ranges import TS_PLAUSIBLE
from xo_fit.job.reading import (Reader, short, volts, missing, looks_numeric, phase_choice, close_match)
from xo_fit.job.baffle import read_radius
from xo_fit.job.placement import ABOUTS, read_about, read_position

def read_stress(r: Reader) -> StressSpec:
    """``[stress]``: the drive power in W and the rated impedance in ohm, both or neither."""
    d = DEFAULTS["stress"]
    power = r.value("power", "W", d["power"], limits=POWER_W)
    rated = r.value("rated_impedance", "ohm", d["rated_impedance"], limits=OHMS)
    if (power is None) != (rated is None):
        raise r.error("rated_impedance" if rated is None else "power",
                      "give both power (W) and rated_impedance (ohm): power is quoted into the rated impedance")
    r.done()
    return StressSpec(power=power, rated_impedance=rated)


def read_grid(r: Reader) -> Grid:
    """``[grid]``: f_min and f_max in Hz and the number of points (given, or from ``per_octave``), each
    within its limits."""
    d = DEFAULTS["grid"]
    f_min = r.value("f_min", "Hz", d["f_min"])
    f_max = r.value("f_max", "Hz", d["f_max"])
    if f_max <= f_min:
        raise r.error("f_max", f"must be above f_min ({f_min:g} Hz), got {f_max:g} Hz")
    if r.has("points") and r.has("per_octave"):
        raise r.error("per_octave", "give either points or per_octave, not both")
    for key, f in (("f_min", f_min), ("f_max", f_max)):
        if not GRID_HZ[0] <= f <= GRID_HZ[1]:
            raise r.error(key, f"{f:g} Hz is outside {GRID_HZ[0]:g} Hz to {GRID_HZ[1]:g} Hz")
    if r.has("per_octave"):
        per_octave = r.number("per_octave", None, integer=True, minimum=1, maximum=1000)
        points = int(np.ceil(np.log2(f_max / f_min) * per_octave - 1e-9)) + 1
        if points > MAX_POINTS:
            raise r.error("per_octave", f"{per_octave} per octave from {f_min:g} to {f_max:g} Hz makes {points} "
                                        f"points; at most {MAX_POINTS}")
    else:
        points = r.number("points", d["points"], integer=True, minimum=2, maximum=MAX_POINTS)
    r.done()
    return Grid(f_min=f_min, f_max=f_max, points=points)


def read_driver(name: str, r: Reader, voltage: float) -> DriverSpec:
    """``[driver.NAME]``: the driver's response and impedance, how they are read and placed, its tables."""
    if not is_name(name, NAME_PATTERN):
        raise r.error(None, f"{name!r}: a driver name must start with a letter and hold only letters, digits, _ and -")
    d = DEFAULTS["driver"]
    if not r.has("response"):
        raise r.error("response", "missing; expected a measurement file path, or a level in dB SPL "
                                  "for an ideal flat driver")
    if not r.has("impedance"):
        raise r.error("impedance", "missing; expected a measurement file path, a resistance in ohm, "
                      "or a Thiele-Small table {re, le, fs, qms, qes}")
    response, baffled = read_response(name, r)
    impedance = read_impedance(name, r)
    from_file = isinstance(response, (FileCurve, SplicedResponse))
    spec = DriverSpec(
        name=name,
        response=response,
        impedance=impedance,
        reference_voltage=volts(r, "reference_voltage", d["reference_voltage"]),
        offset=r.value("offset", "m", d["offset"], positive=False, limits=OFFSET_M),
        phase=phase_choice(r, "phase"),
        impedance_phase=phase_choice(r, "impedance_phase"),
        extend_low=r.choice("extend_low", ("none", "slope", "order2", "order4"), d["extend_low"]),
        extend_high=r.choice("extend_high", ("none", "slope"), d["extend_high"]),
        impedance_extend_low=r.choice("impedance_extend_low", ("none", "slope"), d["impedance_extend_low"]),
        impedance_extend_high=r.choice("impedance_extend_high", ("none", "slope"), d["impedance_extend_high"]),
        angles=read_angles(r.sub("angles", f"[driver.{name}.angles]"), from_file) if r.has("angles") else None,
        position=read_position(r.sub("position", f"[driver.{name}.position]")) if r.has("position") else None,
        about=read_about(r, name, from_file),
        ts=read_ts(r.sub("ts", f"[driver.{name}.ts]")) if r.has("ts") else None,
        box=read_box(r.sub("box", f"[driver.{name}.box]")) if r.has("box") else None,
        radius=read_radius(r),
        baffle=baffled,
    )
    check_driver(name, r, spec)
    r.done()
    return spec


def read_response(name: str, r: Reader) -> tuple[FileCurve | FlatResponse | SplicedResponse, bool]:
    """A driver's ``response``: a level (an ideal flat driver), a file, or a table (one file or a splice);
    and whether it lacks the cabinet's edges (``baffle = true``)."""
    resp = r.raw("response")
    if isinstance(resp, (int, float)) and not isinstance(resp, bool):
        if not (math.isfinite(resp) and -300 <= resp <= 300):
            raise r.error("response", f"a flat driver's level must be -300 to 300 dB SPL, got {short(resp)}")
        return FlatResponse(float(resp)), False
    if isinstance(resp, dict):
        t = r.sub("response", f"[driver.{name}.response]")
        response = response_table(t)
        baffled = t.boolean("baffle", DEFAULTS["splice"]["baffle"])
        t.done()
        if isinstance(response, SplicedResponse) and phase_choice(r, "phase") != "minimum":
            raise r.error("phase", "a spliced response must use phase = \"minimum\": the near and far fields' "
                                   "phases do not join, the spliced magnitude gives the phase")
        return response, baffled
    return FileCurve(r.path("response")), False


def read_impedance(name: str, r: Reader) -> FileCurve | Resistive | ThieleSmall | ModelImpedance:
    """A driver's ``impedance``: "model" (its [driver.NAME.ts] set in its box), a Thiele-Small table, a
    resistance, or a file."""
    imp = r.raw("impedance")
    if imp == "model":
        if not r.has("ts"):
            raise r.error("impedance", f"\"model\" needs the driver's parameters: add a [driver.{name}.ts] table "
                                       "(re, fs, qms, qes or a set that determines them)")
        return ModelImpedance()
    if isinstance(imp, dict):
        t = r.sub("impedance", f"[driver.{name}.impedance]")
        impedance = ThieleSmall(
            re=t.value("re", "ohm", required=True),
            le=t.value("le", "H", DEFAULTS["thiele_small"]["le"], allow_zero=True),
            fs=t.value("fs", "Hz", required=True),
            qms=t.number("qms", None, minimum=1e-3) or missing(t, "qms"),
            qes=t.number("qes", None, minimum=1e-3) or missing(t, "qes"),
            le_exponent=t.number("le_exponent", DEFAULTS["thiele_small"]["le_exponent"], minimum=0.0, maximum=1.0),
            l2=t.value("l2", "H", DEFAULTS["thiele_small"]["l2"], allow_zero=True),
            r2=t.value("r2", "ohm", DEFAULTS["thiele_small"]["r2"], allow_zero=True),
        )
        if (impedance.l2 > 0) != (impedance.r2 > 0):
            raise t.error("l2" if impedance.r2 > 0 else "r2",
                          "the lossy-coil branch needs both l2 (H) and r2 (ohm) above zero, or neither")
        t.done()
        return impedance
    if (isinstance(imp, str) and looks_numeric(imp)) or (isinstance(imp, (int, float)) and not isinstance(imp, bool)):
        return Resistive(r.value("impedance", "ohm", required=True))
    return FileCurve(r.path("impedance"))


def check_driver(name: str, r: Reader, spec: DriverSpec) -> None:
    """What a driver's keys must agree on: a box needs a parameter set; only file data are extended, and then
    with derived phase."""
    if spec.box is not None and spec.ts is None:
        raise r.error("box", f"a box needs the driver's parameters: add a [driver.{name}.ts] table with vas (or sd "
                             "and a scale of the moving system)")
    for keys, what, phase_key in ((("extend_low", "extend_high"), "response", "phase"),
                                  (("impedance_extend_low", "impedance_extend_high"), "impedance", "impedance_phase")):
        for key in keys:
            if getattr(spec, key) != "none":
                if not isinstance(getattr(spec, what), (FileCurve, SplicedResponse)):
                    raise r.error(key, f"only a {what} read from a file can be extended")
                if getattr(spec, phase_key) != "minimum":
                    raise r.error(key, f"an extended {what} must use {phase_key} = \"minimum\": the measured phase "
                                       "stops at the file's end, the extended magnitude gives the phase")


def response_table(t: Reader) -> FileCurve | SplicedResponse:
    """``response = { file, baffle }`` (one file) or ``{ near, far, splice_hz, baffle }`` (a splice)."""
    if t.has("file"):
        if t.has("near") or t.has("far") or t.has("splice_hz"):
            raise t.error("file", "give file (one curve), or near, far and splice_hz (a splice), not both")
        return FileCurve(t.path("file"))
    if not (t.has("near") or t.has("far")):
        raise t.error(None, "expected file = PATH (one curve), or near, far and splice_hz (a splice)")
    return SplicedResponse(near=t.path("near"), far=t.path("far"), splice_hz=t.value("splice_hz", "Hz",
                                                                                     required=True))


def read_ts(r: Reader) -> FrozenMap:
    """[driver.NAME.ts]: the Thiele-Small values given, SI (which of them determine the rest is worked out
    when the job's drivers are modelled, :mod:`xo_fit.model.drivers`)."""
    out: dict[str, float] = {}
    for key in r.data:
        if key in TS_UNITS:
            out[key] = r.value(key, TS_UNITS[key], required=True, allow_zero=key == "le")
    r.done()
    if ("l2" in out) != ("r2" in out):
        raise r.error("l2" if "r2" in out else "r2", "the lossy coil needs both l2 (H) and r2 (ohm, across l2)")
    if not out:
        raise r.error(None, "empty; expected the driver's parameters (re, fs, qms, qes, vas, sd, ...)")
    plausible(r, out, TS_UNITS)
    return FrozenMap(out)


def plausible(r: Reader, values: Mapping[str, float], units: Mapping[str, str]) -> None:
    """A one-line warning for each value outside what drivers and boxes have (TS_PLAUSIBLE): a unit slip."""
    for key, v in values.items():
        lo, hi = TS_PLAUSIBLE[key]
        if v is not None and not lo <= v <= hi:
            unit = {"m3": "m^3", "m2": "m^2"}.get(units[key], units[key])
            r.ctx.warn(r.table, key, f"{r.label} {key} = {v:g} {unit} lies outside what drivers and boxes have "
                                     f"({lo:g} to {hi:g} {unit}); check the unit (\"60L\", \"220cm2\", \"6mm\")")


def read_box(r: Reader) -> BoxSpec:
    """[driver.NAME.box]: type "closed" or "vented", volume, and a vented box's tuning and ql."""
    kind = r.choice("type", ("closed", "vented"), None)
    if kind is None:
        raise r.error("type", "missing; expected \"closed\" or \"vented\"")
    volume = r.value("volume", "m3", required=True)
    if kind == "closed":
        for key in ("tuning", "ql"):
            if r.has(key):
                raise r.error(key, f"a closed box takes no {key} (a vented box's); give type = \"vented\" or leave "
                                   f"{key} out")
        r.done()
        plausible(r, {"volume": volume}, {"volume": "m3"})
        return BoxSpec("closed", volume)
    tuning = r.value("tuning", "Hz", required=True)
    ql = r.value("ql", "", DEFAULTS["box"]["ql"])
    r.done()
    plausible(r, {"volume": volume, "tuning": tuning, "ql": ql}, {"volume": "m3", "tuning": "Hz", "ql": ""})
    return BoxSpec("vented", volume, tuning, ql)


def read_angles(r: Reader, measured: bool) -> AngleSpec:
    """[driver.NAME.angles]: file patterns with {angle}, the angle lists, mirror."""
    if not measured:
        raise r.error(None, "a driver with off-axis files needs its on-axis response from a file too")
    patterns = {}
    for key in ("horizontal", "vertical"):
        if r.has(key):
            v = r.text(key)
            if v.count("{angle}") != 1 or re.search(r"[\x00-\x1f\x7f]", v):
                raise r.error(key, "expected a file pattern holding {angle} once "
                                   f"(e.g. \"polar/woofer-h{{angle}}.txt\"), got {short(v)}")
            p = Path(v)
            patterns[key] = str(p if p.is_absolute() else (r.ctx.folder / p))
        lists_key = f"{key}_angles"
        if r.has(key) != r.has(lists_key):
            raise r.error(lists_key if r.has(key) else key, f"give {key} and {lists_key} together")
    if not patterns:
        raise r.error(None, "expected horizontal (with horizontal_angles) or vertical (with vertical_angles)")
    lists = {}
    for key in ("horizontal_angles", "vertical_angles"):
        raw = r.raw(key, [])
        if not isinstance(raw, list) or not raw or not all(isinstance(a, int) and not isinstance(a, bool)
                                                            and -180 <= a <= 180 for a in raw):
            if key[:-7] in patterns:
                raise r.error(key, f"expected a list of whole degrees from -180 to 180, got {short(raw)}")
            raw = []
        seen: dict = {}
        for a in raw:
            pos = position(key[0], a)
            if pos in seen and {a, seen[pos]} != {180, -180}:  # -180 and 180: one position, its file used once
                raise r.error(key, f"{a} and {seen[pos]} deg are the same position; list it once")
            seen[pos] = a
        lists[key] = tuple(raw)
    r.choice("about", ABOUTS, None)  # kept on the driver (read_about)
    spec = AngleSpec(horizontal=patterns.get("horizontal"), vertical=patterns.get("vertical"),
                     horizontal_angles=lists["horizontal_angles"], vertical_angles=lists["vertical_angles"],
                     mirror=r.boolean("mirror", DEFAULTS["angles"]["mirror"]))
    r.done()
    return spec


def read_target(r: Reader, driver_names: set[str]) -> TargetSpec:
    """``[target]``: the band in Hz, the level (dB SPL or ``"auto"``), the curve, the reference, and
    each ``[target.way.NAME]`` of a defined driver."""
    d = DEFAULTS["target"]
    band = None
    if r.has("band"):
        raw = r.raw("band")
        if not isinstance(raw, list) or len(raw) != 2:
            raise r.error("band", f"expected [low, high] in Hz, got {raw!r}")
        try:
            lo, hi = (parse_value(v, "Hz") for v in raw)
        except UnitsError as e:
            raise r.error("band", e.message) from None
        if hi <= lo:
            raise r.error("band", "the high end must be above the low end")
        band = (lo, hi)
    level: float | str = d["level"]
    if r.has("level"):
        raw = r.raw("level")
        if raw == "auto":
            level = "auto"
        elif isinstance(raw, (int, float)) and not isinstance(raw, bool) and math.isfinite(raw) and abs(raw) <= 300:
            level = float(raw)
        else:
            raise r.error("level", f"expected \"auto\" or a level in dB SPL (-300 to 300), got {short(raw)}")
    curve = r.text("curve", d["curve"])
    reference = r.choice("reference", ("on_axis", "listening_window"), d["reference"])
    ways = []
    w_table = r.sub("way", "[target.way]")
    for wname in w_table.data:
        w_table.used.add(wname)
        if wname not in driver_names:
            raise w_table.error(wname, f"no driver named '{wname}'; defined drivers: {', '.join(sorted(driver_names))}")
        ways.append(read_way(wname, w_table.sub(wname, f"[target.way.{wname}]")))
    r.done()
    return TargetSpec(band=band, level=level, curve=curve, ways=tuple(ways), reference=reference)


def read_way(name: str, r: Reader) -> WayTarget:
    """``[target.way.NAME]``: the way's type, alignment and order, its crossover frequencies in Hz (fc,
    or fc_low and fc_high for a bandpass) and its polarity."""
    d = DEFAULTS["way"]
    wtype = r.choice("type", ("lowpass", "highpass", "bandpass", "fullrange"), None)
    if wtype is None:
        raise r.error("type", "missing; expected lowpass, highpass or bandpass")
    alignment = r.choice("alignment", ("LR", "BW", "Bessel"), d["alignment"])
    order = r.number("order", d["order"], integer=True, minimum=1, maximum=8)
    if alignment == "LR" and order % 2:
        raise r.error("order", f"a Linkwitz-Riley alignment has an even order (2, 4, 6, 8), got {order}")
    fc = fc_low = fc_high = None
    if wtype == "bandpass":
        fc_low = r.value("fc_low", "Hz", required=True, limits=GRID_HZ)
        fc_high = r.value("fc_high", "Hz", required=True, limits=GRID_HZ)
        if fc_high <= fc_low:
            raise r.error("fc_high", "must be above fc_low")
        if r.has("fc"):
            raise r.error("fc", "a bandpass takes fc_low and fc_high, not fc")
    elif wtype != "fullrange":
        fc = r.value("fc", "Hz", required=True, limits=GRID_HZ)
    polarity = r.choice("polarity", ("auto", "normal", "inverted"), d["polarity"])
    r.done()
    return WayTarget(driver=name, type=wtype, alignment=alignment, order=order, fc=fc, fc_low=fc_low,
                     fc_high=fc_high, polarity=polarity)


def read_cost(r: Reader) -> CostSpec:
    """``[cost]``: the weights of the cost terms (dimensionless, 0 up to the largest weight allowed) and
    the impedance floor in ohm."""
    d = DEFAULTS["cost"]
    spec = CostSpec(
        way=r.number("way", d["way"], minimum=0.0, maximum=MAX_WEIGHT),
        sum=r.number("sum", d["sum"], minimum=0.0, maximum=MAX_WEIGHT),
        phase=r.number("phase", d["phase"], minimum=0.0, maximum=MAX_WEIGHT),
        impedance=r.number("impedance", d["impedance"], minimum=0.0, maximum=MAX_WEIGHT),
        impedance_min=r.value("impedance_min", "ohm", d["impedance_min"], allow_zero=True, limits=OHMS),
        stress=r.number("stress", d["stress"], minimum=0.0, maximum=MAX_WEIGHT),
        early_reflections=r.number("early_reflections", d["early_reflections"], minimum=0.0, maximum=MAX_WEIGHT),
        sound_power=r.number("sound_power", d["sound_power"], minimum=0.0, maximum=MAX_WEIGHT),
        preference=r.number("preference", d["preference"], minimum=0.0, maximum=MAX_WEIGHT),
        protection=r.number("protection", d["protection"], minimum=0.0, maximum=MAX_WEIGHT),
    )
    r.done()
    return spec


#: The search engines by name (xo_fit.search.engines.ENGINES, and "auto"), besides ng-NAME.
OPTIMIZERS = ("auto", "de", "scipy-de")


def optimizer_problem(name: str) -> str | None:
    """What is wrong with an optimizer name (``auto``, ``de``, ``scipy-de`` or ``ng-NAME``), or None."""
    if name in OPTIMIZERS:
        return None
    if not name.startswith("ng-"):
        return (f"unknown optimizer {name!r}; expected {', '.join(OPTIMIZERS)} or ng-NAME (a nevergrad optimizer "
                "such as ng-TwoPointsDE or ng-CMA)")
    try:
        import nevergrad
    except ImportError:
        return f"{name!r} needs nevergrad, which is not installed (pip install nevergrad)"
    known = list(nevergrad.optimizers.registry)
    if name[3:] in known:
        return None
    hint = close_match(name[3:], known)
    return f"unknown nevergrad optimizer {name[3:]!r}" + (f" (did you mean 'ng-{hint}'?)" if hint else "")


def optimizer_of(r: Reader) -> str:
    """``[search] optimizer``, checked (:func:`optimizer_problem`); a bad name raises JobError."""
    name = r.text("optimizer", DEFAULTS["search"]["optimizer"])
    problem = optimizer_problem(name)
    if problem:
        raise r.error("optimizer", problem)
    return name


def read_search(r: Reader) -> SearchSpec:
    """``[search]``: optimizer, budget (cost evaluations), seed, time limit in s, polish, and
    ``[search.robust] samples``."""
    d = DEFAULTS["search"]
    robust = 0
    if r.has("robust"):
        rr = r.sub("robust", "[search.robust]")
        robust = rr.number("samples", 0, integer=True, minimum=1, maximum=100000)
        rr.done()
    spec = SearchSpec(
        optimizer=optimizer_of(r),
        budget=r.number("budget", d["budget"], integer=True, minimum=1, maximum=10**9),
        seed=r.number("seed", d["seed"], integer=True, minimum=0),
        time_limit=r.value("time_limit", "s", d["time_limit"]),
        polish=r.boolean("polish", d["polish"]),
        robust_samples=robust,
    )
    r.done()
    return spec


def read_snap(r: Reader) -> SnapSpec:
    """``[snap]``: the series of each kind (one name for all, or a table by kind), the inventory's path,
    ``combine`` (1 or 2) and ``top_up`` (a series name)."""
    d = DEFAULTS["snap"]
    series = dict(d["series"])
    if r.has("series"):
        raw = r.raw("series")
        if isinstance(raw, str):
            series = {k: raw for k in series}
        elif isinstance(raw, dict):
            for k, v in raw.items():
                if k not in series:
                    raise r.error("series", f"unknown part kind '{k}'; expected L, C or R")
                if not isinstance(v, str):
                    raise r.error("series", f"expected a series name such as \"E12\" for {k}, got {v!r}")
                series[k] = v
        else:
            raise r.error("series", f"expected a series name or a table {{L = \"E12\", ...}}, got {raw!r}")
        from xo_fit.series import check_name

        for k, v in series.items():
            try:
                series[k] = check_name(v)
            except XoFitError as e:
                raise r.error("series", f"{k}: {e.message}") from None
    inventory = r.path("inventory") if r.has("inventory") else None
    combine = r.number("combine", d["combine"], integer=True, minimum=1, maximum=2)
    top_up = r.text("top_up", d["top_up"])
    if top_up is not None:
        from xo_fit.series import check_name

        try:
            top_up = check_name(top_up)
        except XoFitError as e:
            raise r.error("top_up", e.message) from None
    r.done()
    return SnapSpec(series=FrozenMap(series), inventory=inventory, combine=combine, top_up=top_up)


def read_spread(r: Reader) -> SpreadSpec:
    """``[spread]``: the Monte Carlo's samples, seed, distribution, quasi-random draws (qmc), the yield's
    limits in dB (band_db, rms_limit_db) and the default tolerance of each kind (a fraction below 1)."""
    d = DEFAULTS["spread"]
    tol = dict(d["tolerance"])
    if r.has("tolerance"):
        raw = r.raw("tolerance")
        if not isinstance(raw, dict):
            raise r.error("tolerance", f"expected a table such as {{R = \"5%\", L = \"5%\", C = \"5%\"}}, got {raw!r}")
        for k, v in raw.items():
            if k not in tol:
                raise r.error("tolerance", f"unknown part kind '{k}'; expected R, L or C")
            try:
                tol[k] = parse_percent(v, below=1.0)
            except UnitsError as e:
                raise r.error("tolerance", f"{k}: {e.message}") from None
    spec = SpreadSpec(
        samples=r.number("samples", d["samples"], integer=True, minimum=1, maximum=10**8),
        seed=r.number("seed", d["seed"], integer=True, minimum=0),
        distribution=r.choice("distribution", ("uniform", "normal"), d["distribution"]),
        band_db=r.number("band_db", d["band_db"], minimum=0.0, maximum=100.0),
        qmc=r.boolean("qmc", d["qmc"]),
        rms_limit_db=r.number("rms_limit_db", d["rms_limit_db"], minimum=0.0, maximum=100.0),
        tolerance=FrozenMap(tol),
    )
    r.done()
    return spec


def check_protection(cost: CostSpec, stress: StressSpec, drivers: list[DriverSpec], ctx) -> None:
    """``[cost] protection`` needs the drive ([stress] power) and is 0 without a driver rated in its ts."""
    if cost.protection <= 0:
        return
    if not stress.power:
        raise ctx.error(("cost",), "protection", "a protection weight needs the drive: [stress] power and "
                        "rated_impedance", "[cost] protection")
    if not any(d.ts and ("xmax" in d.ts or "power" in d.ts) for d in drivers):
        ctx.warn(("cost",), "protection", "[cost] protection is set but no driver's [driver.NAME.ts] gives xmax "
                 "or power: the term is always 0")
