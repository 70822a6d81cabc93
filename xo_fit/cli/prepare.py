"""Commands that look at a job or its data before a design exists: check, driver, baffle."""

from __future__ import annotations

from pathlib import Path

import typer

from xo_fit.cli.base import app
from xo_fit.cli.console import load_checked, say, warn
from xo_fit.errors import XoFitError
from xo_fit.output.describe import describe


@app.command()
def check(job: Path = typer.Argument(..., help="The job file (TOML).")) -> None:
    """Read and validate a job and its data; show the grid, drivers, parts, free values and nodes."""
    from xo_fit.job.sweep import has_sweep

    if has_sweep(job):
        from xo_fit.job.sweep import expand_job
        from xo_fit.model.system import load_system
        from xo_fit.search.fitting import cost_model

        variants = expand_job(job)
        for v, _ in variants:
            cost_model(load_system(v))  # every variant's data and target curves must load too
        say(f"job      {job} has a [sweep] of {len(variants)} variants, all valid: "
            + ", ".join(v.name for v, _ in variants))
        say("ok (run them with xo-fit batch)")
        return
    system = load_checked(job)
    from xo_fit.search.fitting import cost_model

    cost_model(system)  # the targets and their shaping curve load as a fit would load them
    for line in describe(system):
        say(line)
    say("ok")


@app.command()
def driver(impedance: Path = typer.Argument(..., help="A measured impedance file (Hz, ohm, optional phase in deg)."),
           model: str = typer.Option("ts", "--model", help="ts (Small's model), ts-lossy (with L2 || R2), vented (the "
                                                           "driver in its vented box: the twin-peak impedance) or "
                                                           "vented-lossy."),
           name: str | None = typer.Option(None, "--name", help="The driver's name in the TOML printed "
                                                                  "(default: from the file name)."),
           volume: str | None = typer.Option(None, "--volume", help="vented: the box's net volume (\"40L\"), "
                                                                      "which gives vas.")) -> None:
    """Fit an equivalent circuit to a measured impedance; print its parameters, the fit error and the TOML to paste."""
    import re

    from xo_fit.api import VENTED_MODELS, fit_driver
    from xo_fit.io.measure import read_curve
    from xo_fit.units import UnitsError, format_value, parse_value

    label = name if name is not None else re.sub(r"[^A-Za-z0-9_-]", "_", impedance.stem) or "NAME"
    if not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", label):
        raise XoFitError(f"a driver name is 1-64 letters, digits, '_' or '-', got {label[:40]!r}", key="--name")
    try:
        vol = parse_value(volume, "m3") if volume is not None else None
    except UnitsError as e:
        raise XoFitError(e.message, key="--volume") from None
    fit = fit_driver(impedance, model, vol)
    curve = read_curve(impedance, "impedance")
    for w in fit.warnings:
        warn(w)
    lo, hi = fit.f_range
    say(f"{impedance}: {curve.frequency.size} points, {format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, "
        + ("with phase: the complex impedance fitted" if fit.used_phase else "no phase: |Z| alone fitted"))
    vented = model in VENTED_MODELS
    say(f"model {model}: " + {"ts": "Small's model (Re, Le, fs, Qms, Qes)",
                              "ts-lossy": "Small's model with a lossy voice coil (Le, then L2 with R2 across it)",
                              "vented": "the driver in a vented box (Small 1973: Re, Le, fs, Qms, Qes, Vas/Vb, fb, QL)",
                              "vented-lossy": "the driver in a vented box with a lossy voice coil (L2 with R2)"}[model])
    p = fit if vented else fit.params
    rows = [("Re", format_value(p.re, "ohm", 4)), ("Le", format_value(p.le, "H", 4)),
            ("fs", format_value(p.fs, "Hz", 4)), ("Qms", f"{p.qms:.4g}"), ("Qes", f"{p.qes:.4g}"),
            ("Qts", f"{fit.qts:.4g}")]
    if model.endswith("-lossy"):
        rows += [("L2", format_value(p.l2, "H", 4)), ("R2", format_value(p.r2, "ohm", 4))]
    if vented:
        rows += [("Vas/Vb", f"{fit.alpha:.4g}")] + ([("Vas", f"{fit.vas * 1e3:.4g} L")] if fit.vas else [])
        rows += [("fb", format_value(fit.fb, "Hz", 4)), ("QL", f"{fit.ql:.3g}")]
    for k, v in rows:
        say(f"  {k:<6} {v}")
    say(f"fit error: {fit.rms_error_pct:.2f} % rms of |Z| over {fit.points} points "
        f"({'each octave weighted alike' if vented else 'log-spaced'}), at most "
        f"{fit.max_error_pct:.2f} % at {format_value(fit.max_error_hz, 'Hz')}")
    say("")
    say("# the driver's parameters and its box to paste into a job (with impedance = \"model\"; fs, qms and qes "
        "are the free-air values):" if vented else "# the impedance to paste into a job (replacing the driver's "
        "impedance = ...):")
    say(fit.toml(label).rstrip("\n"))


@app.command()
def baffle(job: Path = typer.Argument(..., help="The job file (TOML), with a [baffle] table."),
           out: Path = typer.Option(..., "--out", "-o", help="Folder for baffle.csv and baffle.png.")) -> None:
    """Each driver's diffraction response on the job's baffle (the baffle step and the edge ripple), on the axis
    and at the job's angles: baffle.csv and baffle.png."""
    from xo_fit.api import baffle as baffle_of
    from xo_fit.units import format_value

    result = baffle_of(job)
    for w in result.job.warnings:
        warn(w)
    b = result.job.baffle
    say(f"baffle   {format_value(b.x[1] - b.x[0], 'm')} wide, {format_value(b.y[1] - b.y[0], 'm')} high; diffraction "
        f"re the half space on {len(result.frequencies)} points, at {len(result.positions)} position"
        f"{'s' if len(result.positions) > 1 else ''} (docs/baffle.md)")
    for line in result.lines():
        say(line)
    say("wrote " + ", ".join(str(p) for p in result.save(out)))
