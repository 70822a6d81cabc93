"""The ``xo-fit`` command line (contract: ``shared/design/commands.md``).

Commands parse their arguments, call the library and render the outcome. A
user error (:class:`~xo_fit.errors.XoFitError`) becomes one line on stderr and
exit code 2; anything else is a bug and keeps its traceback (exit 1).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Optional

import numpy as np
import typer

from .errors import XoFitError

app = typer.Typer(add_completion=False, pretty_exceptions_enable=False, no_args_is_help=True,
                  help="Fit passive loudspeaker crossover part values to measured drivers and an acoustic target.")


class _Output:
    quiet = False
    verbose = False


OUT = _Output()


def say(text: str = "") -> None:
    if not OUT.quiet:
        typer.echo(text)


def warn(text: str) -> None:
    typer.echo(f"warning: {text}", err=True)


@app.callback()
def _common(quiet: bool = typer.Option(False, "--quiet", "-q", help="Print only errors and warnings."),
            verbose: bool = typer.Option(False, "--verbose", "-v", help="Print more detail.")) -> None:
    OUT.quiet = quiet
    OUT.verbose = verbose


def _load(job_path: Path):
    from .job import load_job
    from .system import load_system

    job = load_job(job_path)
    system = load_system(job)
    for w in system.warnings:
        warn(w)
    return system


# ----------------------------------------------------------------------------- check


@app.command()
def check(job: Path = typer.Argument(..., help="The job file (TOML).")) -> None:
    """Read and validate a job and its data; show the grid, drivers, parts, free values and nodes."""
    from .units import format_value

    system = _load(job)
    j = system.job
    f = system.frequencies
    per_oct = (f.size - 1) / np.log2(f[-1] / f[0])
    say(f"job      {j.name}  ({j.path})")
    say(f"grid     {f.size} points, {format_value(f[0], 'Hz')} to {format_value(f[-1], 'Hz')}, "
        f"log-spaced ({per_oct:.1f} per octave)")
    say(f"source   {format_value(j.source_voltage, 'V')} behind {format_value(j.source_resistance, 'ohm')}")
    say("drivers")
    for spec, d in zip(j.drivers, system.drivers):
        say(f"  {spec.name}")
        for what, curve, phase in (("response", d.response_curve, d.response_phase),
                                   ("impedance", d.impedance_curve, d.impedance_phase)):
            if curve is None:
                src = spec.response if what == "response" else spec.impedance
                say(f"    {what:<9} {type(src).__name__}: {_describe_ideal(src)}")
            else:
                lo, hi = curve.f_range
                kind = {"measured": "phase measured", "minimum": "phase derived (minimum phase)"}[phase]
                if what == "response" and phase == "measured" and curve.phase_deg is None:
                    kind = "no phase"
                say(f"    {what:<9} {curve.path}  {len(curve.frequency)} points, "
                    f"{format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, {kind}")
        say(f"    reference {format_value(spec.reference_voltage, 'V')}, offset {format_value(spec.offset, 'm')}")
    say("parts")
    say(f"  {'name':<10} {'type':<6} {'nodes':<14} {'value':<11} {'range':<24} {'notes'}")
    for p in j.parts:
        nodes = f"{p.nodes[0]} -> {p.nodes[1]}"
        if p.type == "driver":
            say(f"  {p.name:<10} {p.type:<6} {nodes:<14} {'':<11} {'':<24} driver {p.driver}")
            continue
        value = format_value(p.value, p.unit) if p.value is not None else "-"
        rng = (f"{format_value(p.min, p.unit)} .. {format_value(p.max, p.unit)}" if p.min is not None else "")
        notes = ["free" if p.free else "fixed"]
        if p.type == "L" and p.dcr_wire:
            from .coils import coil_dcr
            at = p.value if p.value is not None else float(np.sqrt(p.min * p.max))
            notes.append(f"dcr from {p.dcr * 1e3:.3f} mm wire ({format_value(float(coil_dcr(at, p.dcr)), 'ohm')} "
                         f"at {format_value(at, 'H')})")
        elif p.type == "L" and p.dcr:
            notes.append(f"dcr {format_value(p.dcr, 'ohm')}")
        if p.type == "C" and p.esr:
            notes.append(f"esr {format_value(p.esr, 'ohm')}")
        if p.tolerance is not None:
            notes.append(f"tol {p.tolerance * 100:g}%")
        say(f"  {p.name:<10} {p.type:<6} {nodes:<14} {value:<11} {rng:<24} {', '.join(notes)}")
    free = [p.name for p in j.free_parts]
    say(f"free     {len(free)}: {', '.join(free) if free else '(none: every value is fixed)'}")
    nodes = sorted({n for p in j.parts for n in p.nodes}, key=lambda n: ({"in": 0, "0": 1}.get(n, 2), n))
    say(f"nodes    {len(nodes)}: {', '.join(nodes)}")
    say("ok")


def _describe_ideal(src) -> str:
    from .job import FlatResponse, Resistive, ThieleSmall
    from .units import format_value

    if isinstance(src, FlatResponse):
        return f"flat {src.level_db:g} dB SPL, zero phase"
    if isinstance(src, Resistive):
        return f"{format_value(src.resistance, 'ohm')}, zero phase"
    if isinstance(src, ThieleSmall):
        return (f"Re {format_value(src.re, 'ohm')}, Le {format_value(src.le, 'H')}, fs {format_value(src.fs, 'Hz')}, "
                f"Qms {src.qms:g}, Qes {src.qes:g}")
    return str(src)


# ----------------------------------------------------------------------------- simulate


@app.command()
def simulate(job: Path = typer.Argument(..., help="The job file (TOML)."),
             out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv and plots."),
             from_: Optional[Path] = typer.Option(None, "--from", help="A result.json (or its folder) whose values to use."),
             ) -> None:
    """Evaluate the job's own values (a hand design), or those of a result, and write the curves."""
    from .cost import simulation_metrics
    from .report import plot_simulation
    from .results import part_entries, read_result, response_table, result_values, write_csv, write_json
    from .cautions import load_cautions

    t0 = time.perf_counter()
    system = _load(job)
    j = system.job
    overrides = None
    if from_ is not None:
        data = read_result(from_)
        overrides = result_values(data, system.part_names, from_)
    values = system.values(overrides)
    sim = system.simulate(values)
    metrics = simulation_metrics(system, sim)
    units = tuple(p.unit for p in j.valued_parts)
    result = {
        "job": j.name,
        "stage": "simulate",
        "parts": part_entries(system.part_names, units, values),
        "cost": None,
        "cost_terms": {},
        "metrics": metrics,
        "source": {"job": str(j.path), "from": str(from_) if from_ else None},
    }
    out.mkdir(parents=True, exist_ok=True)
    write_json(out / "result.json", result)
    names = tuple(d.name for d in j.drivers)
    write_csv(out / "response.csv", response_table(system.frequencies, names, sim.pressure[0], sim.total[0],
                                                   sim.impedance[0]))
    plot_simulation(out / "response.png", system.frequencies, names, sim.pressure[0], sim.total[0],
                    sim.impedance[0], title=f"{j.name}: simulated", impedance_floor=j.cost.impedance_min,
                    band=j.target.band)
    say(f"simulated {j.name}: {len(values)} part values, {system.frequencies.size} points "
        f"in {time.perf_counter() - t0:.2f} s")
    say(f"  impedance minimum {metrics['impedance_min_ohm']:.2f} ohm at {metrics['impedance_min_hz']:.0f} Hz")
    for c in load_cautions(metrics["impedance_min_ohm"], j.cost.impedance_min):
        say(f"  caution: {c}")
    say(f"wrote {out / 'result.json'}, {out / 'response.csv'}, {out / 'response.png'}")


# ----------------------------------------------------------------------------- demo


@app.command()
def demo(out: Path = typer.Option(..., "--out", "-o", help="Folder for the scenario and its results.")) -> None:
    """The invented two-way scenario: write its measurement files and job, then simulate its hand design."""
    from .demo import write_scenario

    job = write_scenario(out / "scenario")
    say(f"wrote the demo scenario: {job} and its measurement files in {job.parent / 'data'}")
    simulate(job=job, out=out / "hand-design", from_=None)


# ----------------------------------------------------------------------------- entry point


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return the exit code (0 done, 1 failure, 2 bad input)."""
    try:
        app(args=argv, prog_name="xo-fit")
    except XoFitError as e:
        typer.echo(f"xo-fit: error: {e}", err=True)
        return 2
    except SystemExit as e:  # typer's own exits: --help (0), usage errors (2)
        if e.code is None:
            return 0
        return e.code if isinstance(e.code, int) else 1
    return 0
