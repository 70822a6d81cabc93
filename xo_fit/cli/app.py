"""The ``xo-fit`` command line (README.md describes every command).

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

from xo_fit.errors import XoFitError
from xo_fit.job.model import DEFAULTS

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


def _version(value: bool) -> None:
    if value:
        from xo_fit import __version__

        typer.echo(f"xo-fit {__version__}")
        raise typer.Exit(0)


@app.callback()
def _common(quiet: bool = typer.Option(False, "--quiet", "-q", help="Print only errors and warnings."),
            verbose: bool = typer.Option(False, "--verbose", "-v", help="Print more detail."),
            version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                         help="Print the version and exit.")) -> None:
    OUT.quiet = quiet
    OUT.verbose = verbose


def _design(job_path: Path, from_: Path | None):
    """The loaded system and a design (P,): the job's own values, or those of a result (--from)."""
    from xo_fit.io.results import read_result, result_values

    system = _load(job_path)
    overrides = None
    if from_ is not None:
        overrides = result_values(read_result(from_), system.part_names, from_)
    return system, system.values(overrides)


def _part_info(from_: Path | None) -> dict:
    """What a result says of each part beyond its value (a snap's series, source and combination)."""
    if from_ is None:
        return {}
    from xo_fit.output.design import PART_RECOMPUTED
    from xo_fit.io.results import read_result

    return {n: {k: v for k, v in e.items() if k not in PART_RECOMPUTED}
            for n, e in read_result(from_)["parts"].items() if isinstance(e, dict)}


def _load(job_path: Path):
    from xo_fit.job.reader import load_job
    from xo_fit.model.system import load_system

    t0 = time.perf_counter()
    job = load_job(job_path)
    system = load_system(job)
    for w in system.warnings:
        warn(w)
    if OUT.verbose:
        from xo_fit.solver.kernels import cache_dir

        say(f"  loaded {job.path} and its data in {time.perf_counter() - t0:.3f} s "
            f"({len(job.valued_parts)} parts, {len(job.drivers)} drivers, {system.frequencies.size} points); "
            f"compiled kernels are cached in {cache_dir()}")
    return system


# ----------------------------------------------------------------------------- check


def _extension_text(spec, what: str, lo: float, hi: float, f: np.ndarray) -> str:
    """How a driver's file is extended to the grid ``f`` (Hz): "" where it is not."""
    from xo_fit.units import format_value

    low, high = ((spec.extend_low, spec.extend_high) if what == "response"
                 else (spec.impedance_extend_low, spec.impedance_extend_high))
    out = []
    if low != "none" and f[0] < lo:
        out.append(f"extended below to {format_value(f[0], 'Hz')} ({low})")
    if high != "none" and f[-1] > hi:
        out.append(f"extended above to {format_value(f[-1], 'Hz')} ({high})")
    return ", ".join(out)


@app.command()
def check(job: Path = typer.Argument(..., help="The job file (TOML).")) -> None:
    """Read and validate a job and its data; show the grid, drivers, parts, free values and nodes."""
    from xo_fit.job.sweep import has_sweep
    from xo_fit.units import format_value

    if has_sweep(job):
        from xo_fit.search.fitting import cost_model
        from xo_fit.job.sweep import expand_job
        from xo_fit.model.system import load_system

        variants = expand_job(job)
        for v, _ in variants:
            cost_model(load_system(v))  # every variant's data and target curves must load too
        say(f"job      {job} has a [sweep] of {len(variants)} variants, all valid: "
            + ", ".join(v.name for v, _ in variants))
        say("ok (run them with xo-fit batch)")
        return
    system = _load(job)
    j = system.job
    f = system.frequencies
    from xo_fit.search.fitting import cost_model

    cost_model(system)  # the targets and their shaping curve load as a fit would load them
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
                say(f"    {what:<9} {_describe_ideal(src)}")
            else:
                lo, hi = curve.f_range
                kind = {"measured": "phase measured", "minimum": "phase derived (minimum phase)"}[phase]
                if what == "response" and phase == "measured" and curve.phase_deg is None:
                    kind = "no phase"
                if what == "response" and d.splice is not None:
                    sp = spec.response
                    say(f"    {what:<9} spliced at {format_value(sp.splice_hz, 'Hz')}: near field {sp.near} below, "
                        f"far field {sp.far} above; near field {d.splice.gain_db:+.2f} dB to match over the third "
                        f"of an octave there; {format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, {kind}")
                else:
                    say(f"    {what:<9} {curve.path}  {len(curve.frequency)} points, "
                        f"measured {format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, {kind}")
                ext = _extension_text(spec, what, lo, hi, f)
                if ext:
                    say(f"    {'':<9} {ext}")
        say(f"    reference {format_value(spec.reference_voltage, 'V')}, offset {format_value(spec.offset, 'm')}")
        if spec.angles is not None:
            files = spec.angles.files()
            mirrored = sum(1 for pos, (_, a) in files.items() if a != pos[1])
            say(f"    angles    {len(files) + 1} positions with the axis ({sum(1 for p in files if p[0] == 'h')} "
                f"horizontal, {sum(1 for p in files if p[0] == 'v')} vertical)"
                + (f", {mirrored} mirrored" if mirrored else ""))
    if system.positions:
        from xo_fit.model.acoustics import curve_weights, missing_positions

        weights = curve_weights(system.positions)
        have = [k.replace("_", " ") for k, w in weights.items() if w is not None]
        lack = []
        for k in (k for k, w in weights.items() if w is None):
            miss = missing_positions(system.positions, k)
            lack.append(f"{k.replace('_', ' ')} (needs {', '.join(f'{o}{a}' for o, a in miss[:4])}"
                        f"{' ...' if len(miss) > 4 else ''})")
        say(f"off axis {len(system.positions)} positions; curves: on axis"
            + "".join(f", {x}" for x in have) + (f"; not available: {'; '.join(lack)}" if lack else ""))
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
            from xo_fit.physics.coils import coil_dcr
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
    if j.target.ways:
        from xo_fit.model.targets import polarities

        pol = polarities(j.target.ways)
        band = j.target.band
        say(f"target   band {format_value(band[0], 'Hz')} to {format_value(band[1], 'Hz')}" if band else
            "target   band: the whole grid")
        level = "auto" if j.target.level == "auto" else f"{j.target.level:g} dB SPL"
        say(f"         level {level}, curve {j.target.curve}"
            + (", applied to the listening window" if j.target.reference == "listening_window" else ""))
        for w in j.target.ways:
            where = (f"{format_value(w.fc_low, 'Hz')} to {format_value(w.fc_high, 'Hz')}" if w.type == "bandpass"
                     else (f"at {format_value(w.fc, 'Hz')}" if w.fc else ""))
            shape = "" if w.type == "fullrange" else f" {w.alignment}{w.order}"
            say(f"  {w.driver:<10} {w.type}{shape}{' ' + where if where else ''}, "
                f"{'inverted' if pol[w.driver] < 0 else 'normal'} polarity")
    free = [p.name for p in j.free_parts]
    say(f"free     {len(free)}: {', '.join(free) if free else '(none: every value is fixed)'}")
    nodes = sorted({n for p in j.parts for n in p.nodes}, key=lambda n: ({"in": 0, "0": 1}.get(n, 2), n))
    say(f"nodes    {len(nodes)}: {', '.join(nodes)}")
    say("ok")


def _describe_ideal(src) -> str:
    from xo_fit.job.model import FlatResponse, Resistive, ThieleSmall
    from xo_fit.units import format_value

    if isinstance(src, FlatResponse):
        return f"ideal flat response, {src.level_db:g} dB SPL, zero phase"
    if isinstance(src, Resistive):
        return f"ideal resistor, {format_value(src.resistance, 'ohm')}, zero phase"
    if isinstance(src, ThieleSmall):
        return (f"Thiele-Small model: Re {format_value(src.re, 'ohm')}, Le {format_value(src.le, 'H')}, "
                f"fs {format_value(src.fs, 'Hz')}, "
                f"Qms {src.qms:g}, Qes {src.qes:g}")
    return str(src)


# ----------------------------------------------------------------------------- simulate


def _print_score(s, start_cost: float | None = None) -> None:
    m = s.metrics
    if s.cost is not None:
        terms = ", ".join(f"{k} {v:.4g}" for k, v in s.terms.items())
        before = f" (start {start_cost:.4g})" if start_cost is not None else ""
        say(f"  cost {s.cost:.4g}{before}: {terms}")
        say(f"  sum vs target: rms {m['rms_error_db']:.2f} dB, worst {m['max_error_db']:.2f} dB; "
            f"phase mismatch at crossover {m['phase_mismatch_deg']:.1f} deg; level {s.level_db:.1f} dB SPL")
    say(f"  impedance minimum {m['impedance_min_ohm']:.2f} ohm at {m['impedance_min_hz']:.0f} Hz")
    if "listening_window_rms_db" in m:
        di = (f"; sound power DI {m['sound_power_di_min_db']:.1f} to {m['sound_power_di_max_db']:.1f} dB over the band"
              if "sound_power_di_min_db" in m else "")
        say(f"  off axis: listening window {m['listening_window_rms_db']:.2f} dB rms from the target{di}")


def _findings(design) -> None:
    b = design.breakdown
    if b is not None:
        parts = [f"{w['way']} {w['rms_db']:.2f} dB rms, worst {w['worst_db']:+.2f} dB at {w['worst_hz']:.0f} Hz"
                 for w in b["ways"]]
        parts += [f"crossover {c['ways']} ({c['from_hz']:.0f}-{c['to_hz']:.0f} Hz): sum {c['sum_rms_db']:.2f} dB rms, "
                  f"phase worst {c['phase_worst_deg']:+.1f} deg at {c['phase_worst_hz']:.0f} Hz" for c in b["crossovers"]]
        say("  where the error lies: " + "; ".join(parts))
    for f in design.findings:
        say(f"  finding ({f['kind']}): {f['text']}")


def _cautions(system, s) -> None:
    from xo_fit.output.cautions import design_cautions, load_cautions

    spec = system.job.stress
    if spec.power:
        from xo_fit.model.stress import stresses

        st = stresses(system, s.values, spec.power, spec.rated_impedance)
        say(f"  stresses at {spec.power:g} W into {spec.rated_impedance:g} ohm ({st.source_v_rms:.2f} V RMS), "
            "sine worst case over the band:")
        for p in st.parts:
            prog = f", programme {p.programme:.3g} W" if p.programme is not None else ""
            rated = f" (rated {p.rating:g} {p.unit})" if p.rating is not None else ""
            say(f"    {p.name:<8} {p.sine_worst:8.3g} {p.unit} {p.figure} at {p.at_hz:.0f} Hz{prog}{rated}")
        notes = design_cautions(st, spec.rated_impedance)
    else:
        notes = load_cautions(s.metrics["impedance_min_ohm"], system.job.cost.impedance_min)
    for c in notes:
        say(f"  caution: {c}")


@app.command()
def simulate(job: Path = typer.Argument(..., help="The job file (TOML)."),
             out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv and plots."),
             from_: Optional[Path] = typer.Option(None, "--from", help="A result.json (or its folder) whose values to use."),
             no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG (faster)."),
             ) -> None:
    """Evaluate the job's own values (a hand design), or those of a result, and write the curves."""
    from xo_fit import api

    t0 = time.perf_counter()
    system, values = _design(job, from_)
    j = system.job
    d = api.simulate(system, dict(zip(system.part_names, values)), source_from=str(from_) if from_ else None)
    files = d.save(out, plots=not no_plots, title=f"{j.name}: simulated")
    s = d.scored
    say(f"simulated {j.name}: {len(s.values)} part values, {system.frequencies.size} points "
        f"in {time.perf_counter() - t0:.2f} s")
    _print_score(s)
    _findings(d)
    _cautions(system, s)
    say("wrote " + ", ".join(str(p) for p in files))


# ----------------------------------------------------------------------------- fit


class _Progress:
    """A one-line progress display on stderr, when it is a terminal and the run lasts more than a moment."""

    def __init__(self, label: str, units: str = "evaluations", figure: str = "best cost") -> None:
        self.label = label
        self.units = units
        self.figure = figure
        self.enabled = sys.stderr.isatty() and not OUT.quiet
        self.t0 = time.monotonic()
        self.last = 0.0
        self.shown = False

    def __call__(self, done: int, total: int, best: float) -> None:
        now = time.monotonic()
        if not self.enabled or now - self.t0 < 0.8 or now - self.last < 0.1:
            return
        self.last = now
        width = 30
        k = int(width * min(done / max(total, 1), 1.0))
        sys.stderr.write(f"\r{self.label} [{'#' * k}{'.' * (width - k)}] {done}/{total} {self.units}, "
                         f"{self.figure} {best:.4g} ")
        sys.stderr.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            sys.stderr.write("\n")
            sys.stderr.flush()


@app.command()
def fit(job: Path = typer.Argument(..., help="The job file (TOML)."),
        out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv and plots."),
        budget: Optional[int] = typer.Option(None, "--budget", min=1, help=f"Cost evaluations (default: the job's \\[search] budget, else {DEFAULTS['search']['budget']})."),
        seed: Optional[int] = typer.Option(None, "--seed", min=0, help=f"Random seed (default: the job's \\[search] seed, else {DEFAULTS['search']['seed']})."),
        optimizer: Optional[str] = typer.Option(None, "--optimizer",
                                                help="auto, de, scipy-de or ng-NAME (a nevergrad optimizer)."),
        time_limit: Optional[float] = typer.Option(None, "--time-limit", min=0.0,
                                                   help="Stop after this many seconds and keep the best so far."),
        workers: int = typer.Option(1, "--workers", min=1, max=64,
                                    help="Processes sharing the budget, each from a seed derived from the job's; "
                                         "the best wins and the result names its seed."),
        no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG (faster)."),
        ) -> None:
    """Search the free part values that best meet the job's acoustic target, then polish locally."""
    from xo_fit.batch.tasks import fit_stage

    t0 = time.perf_counter()
    system = _load(job)
    j = system.job
    progress = _Progress(f"fit {j.name}") if workers == 1 else None
    try:
        st = fit_stage(system, out, optimizer=optimizer, budget=budget, seed=seed, time_limit=time_limit,
                       workers=workers, plots=not no_plots, progress=progress)
    finally:
        if progress is not None:
            progress.close()
    outcome, runs, files = st.info["outcome"], st.info["runs"], st.files
    r = outcome.search
    state = "" if r.complete else f" - INCOMPLETE ({r.stopped_by}): the best design so far"
    say(f"fit {j.name}: {r.evaluations} evaluations with {r.optimizer} (seed {r.seed}) in {r.seconds:.2f} s "
        f"of search, {time.perf_counter() - t0:.2f} s in all{state}")
    _print_score(outcome.scored, outcome.start_cost)
    if runs is not None:
        say(f"  {len(runs)} processes shared the budget; seed {r.seed} won: "
            + ", ".join(f"seed {x['seed']}: {x['cost']:.4g}" for x in runs))
    else:
        basins = sorted(set(round(b, 6) for b in r.basins))
        say(f"  {r.restarts} searches in the budget found {len(basins)} distinct basin"
            f"{'s' if len(basins) != 1 else ''} (best costs before the polish: "
            + ", ".join(f"{b:.4g}" for b in basins[:6]) + ("..." if len(basins) > 6 else "")
            + f"); restart {r.best_restart} led to the result")
    if OUT.verbose and r.history:
        marks = sorted({int(round(x)) for x in np.linspace(0, len(r.history) - 1, 8)})
        say("  convergence (evaluations: best cost): "
            + ", ".join(f"{r.history[i][0]}: {r.history[i][1]:.4g}" for i in marks))
    if not OUT.quiet:
        from xo_fit.units import format_value

        parts = j.valued_parts
        for p, v in zip(parts, outcome.scored.values):
            if p.free:
                start = f" (start {format_value(p.value, p.unit)})" if p.value is not None else ""
                say(f"    {p.name:<8} {format_value(float(v), p.unit)}{start}")
    _findings(st.info["design"])
    _cautions(system, outcome.scored)
    say("wrote " + ", ".join(str(p) for p in files))
    if not r.complete and r.stopped_by == "interrupted":
        raise typer.Exit(130)
    if not r.complete and r.stopped_by and r.stopped_by.startswith("optimizer failed"):
        typer.echo(f"xo-fit: {r.stopped_by}; the best design so far is in {out / 'result.json'}", err=True)
        raise typer.Exit(1)


# ----------------------------------------------------------------------------- snap


def _series_option(text: str | None) -> dict | None:
    """--series "E24" (every kind) or "L=E12,C=E24,R=E96"."""
    if text is None:
        return None
    from xo_fit.series import check_name

    if "=" not in text:
        name = check_name(text)
        return {"R": name, "L": name, "C": name}
    out = {}
    for item in text.split(","):
        kind, _, name = item.partition("=")
        kind = kind.strip().upper()
        if kind not in ("R", "L", "C") or not name.strip():
            raise XoFitError(f"--series: expected a series name or KIND=NAME pairs such as L=E12,C=E24, got '{text}'")
        out[kind] = check_name(name.strip())
    return out


@app.command()
def snap(job: Path = typer.Argument(..., help="The job file (TOML)."),
         out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv, parts.csv, plots."),
         from_: Optional[Path] = typer.Option(None, "--from", help="A result.json (e.g. a fit's) whose values to snap."),
         series: Optional[str] = typer.Option(None, "--series", help='A series for every kind ("E24"), or "L=E12,C=E24".'),
         inventory: Optional[Path] = typer.Option(None, "--inventory", help="A CSV of parts on hand: kind, value \\[, count] (default: the job's \\[snap] inventory)."),
         combine: Optional[int] = typer.Option(None, "--combine", min=1, max=2,
                                               help="2: allow two parts to make one value."),
         top_up: Optional[str] = typer.Option(None, "--top-up",
                                              help="With an inventory: a series to buy from where the drawer lacks "
                                                   "a value (default: the job's \\[snap] top_up)."),
         no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG."),
         ) -> None:
    """Move every part value to a purchasable one (a series or parts on hand) and re-score, searching the
    combinations with the real cost."""
    from xo_fit.constants import PART_UNIT
    from xo_fit.io.inventory import read_inventory
    from xo_fit.batch.tasks import snap_stage
    from xo_fit.units import format_value

    t0 = time.perf_counter()
    system, continuous = _design(job, from_)
    j = system.job
    inv_path = inventory if inventory is not None else j.snap.inventory
    inv = read_inventory(inv_path) if inv_path is not None else None
    st = snap_stage(system, out, continuous, series_override=_series_option(series), inventory=inv, combine=combine,
                    plots=not no_plots, source_from=str(from_) if from_ else None, top_up=top_up)
    outcome, before, after, files = st.info["outcome"], st.info["before"], st.info["after"], st.files
    sr = outcome.search
    say(f"snapped {j.name}: {sum(p.source not in ('fixed', 'continuous') for p in outcome.parts)} parts, "
        f"{sr.evaluations if sr else 0} designs scored ({'exhaustive' if sr and sr.exhaustive else 'searched'}) "
        f"in {outcome.seconds:.2f} s, {time.perf_counter() - t0:.2f} s in all")
    say(f"  {'part':<8} {'continuous':>12} {'snapped':>22} {'change':>8}  source")
    for sp in outcome.parts:
        unit = PART_UNIT[sp.kind]
        shown = sp.choice.describe(unit) if sp.choice is not None else format_value(sp.value, unit)
        change = (sp.value / sp.continuous - 1) * 100
        say(f"  {sp.name:<8} {format_value(sp.continuous, unit):>12} {shown:>22} {change:>+7.1f}%  {sp.source}")
    if before.cost is not None:
        say(f"  cost: continuous {before.cost:.4g}, log-nearest rounding {st.document['snap']['log_nearest_cost']:.4g}, "
            f"snapped {after.cost:.4g}")
        for label, sc in (("continuous", before), ("snapped", after)):
            m = sc.metrics
            say(f"  {label:<10} rms {m['rms_error_db']:.2f} dB, worst {m['max_error_db']:.2f} dB, "
                f"phase {m['phase_mismatch_deg']:.1f} deg, |Z| min {m['impedance_min_ohm']:.2f} ohm")
    _findings(st.info["design"])
    _cautions(system, after)
    say("wrote " + ", ".join(str(p) for p in files))


# ----------------------------------------------------------------------------- spread


@app.command()
def spread(job: Path = typer.Argument(..., help="The job file (TOML)."),
           out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, spread.csv and plots."),
           from_: Optional[Path] = typer.Option(None, "--from", help="A result.json (fit or snap) whose design to use."),
           samples: Optional[int] = typer.Option(None, "--samples", min=1, help=f"Tolerance draws (default: the job's \\[spread] samples, else {DEFAULTS['spread']['samples']})."),
           seed: Optional[int] = typer.Option(None, "--seed", min=0, help=f"Random seed (default: the job's \\[spread] seed, else {DEFAULTS['spread']['seed']})."),
           no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG."),
           ) -> None:
    """Tolerance Monte Carlo of a design: level percentiles, yield, sensitivity per part, worst cases, pair matching."""
    from xo_fit.batch.tasks import spread_stage

    t0 = time.perf_counter()
    system, nominal = _design(job, from_)
    j = system.job
    bar = _Progress(f"spread {j.name}", units="builds", figure="share within the band so far")

    def progress(done: int, total: int, share: float) -> None:
        bar(done, total, share)

    try:
        st = spread_stage(system, out, nominal, samples=samples, seed=seed, plots=not no_plots,
                          source_from=str(from_) if from_ else None, progress=progress, part_info=_part_info(from_))
    finally:
        bar.close()
    r, files = st.info["result"], st.files
    say(f"spread {j.name}: {r.samples} builds ({j.spread.distribution}"
        f"{', quasi-random' if j.spread.qmc else ''}) in {time.perf_counter() - t0:.2f} s")
    say(f"  yield: {r.yield_band * 100:.1f} % within +-{r.limits['band_db']:g} dB of the nominal sum; "
        f"{r.yield_limits * 100:.1f} % meet rms <= {r.limits['rms_error_db']:g} dB"
        + (f" and |Z| >= {r.limits['impedance_min_ohm']:g} ohm" if r.limits["impedance_min_ohm"] > 0 else ""))
    m = st.info["design"].metrics
    misses = []
    if m.get("rms_error_db") is not None and m["rms_error_db"] > r.limits["rms_error_db"]:
        misses.append(f"its rms error is {m['rms_error_db']:.2f} dB (limit {r.limits['rms_error_db']:g} dB)")
    if r.limits["impedance_min_ohm"] > 0 and m["impedance_min_ohm"] < r.limits["impedance_min_ohm"]:
        misses.append(f"its |Z| falls to {m['impedance_min_ohm']:.2f} ohm (floor {r.limits['impedance_min_ohm']:g} ohm)")
    if misses:
        say("  the nominal design itself misses the limits: " + "; ".join(misses)
            + " (so few builds or none can meet them: fit or snap the design first, or relax [spread] rms_limit_db)")
    say(f"  worst build: {r.worst_deviation_db:.2f} dB off at {r.worst_at_hz:.0f} Hz; worst corner "
        f"{r.corners['worst_deviation_db']:.2f} dB ({r.corners['method']})")
    say(f"  left/right matching: largest difference p50 {r.pair_p50_db:.2f} dB, p95 {r.pair_p95_db:.2f} dB")
    say("  most sensitive parts (dB per +1 %, worst over the band):")
    for row in r.sensitivity[:5]:
        say(f"    {row['part']:<8} {row['db_per_pct']:+.3f} dB/% at {row['worst_at_hz']:.0f} Hz "
            f"(tolerance {row['tolerance_pct']:g} %)")
    say("wrote " + ", ".join(str(p) for p in files))


# ----------------------------------------------------------------------------- prune


@app.command()
def prune(job: Path = typer.Argument(..., help="The job file (TOML)."),
          out: Path = typer.Option(..., "--out", "-o", help="Folder for prune.csv, job.toml, result.json and plots."),
          from_: Optional[Path] = typer.Option(None, "--from", help="A result.json (e.g. a fit's) to start from."),
          budget: Optional[int] = typer.Option(None, "--budget", min=1,
                                               help="Cost evaluations per refit (default 600)."),
          seed: Optional[int] = typer.Option(None, "--seed", min=0, help=f"Random seed (default: the job's \\[search] seed, else {DEFAULTS['search']['seed']})."),
          max_increase: float = typer.Option(10.0, "--max-increase", min=0.0,
                                             help="Largest cost increase over step 0 for the chosen design, %."),
          workers: int = typer.Option(1, "--workers", min=1, max=64, help="Processes for the trial removals."),
          no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNGs."),
          ) -> None:
    """Remove, one at a time, the part whose removal costs least (open or short, the rest refitted); keep the
    smallest design within --max-increase of the start."""
    from xo_fit import api

    t0 = time.perf_counter()
    system, values = _design(job, from_)
    j = system.job

    def progress(step: int, name: str, how: str, cost: float) -> None:
        say(f"  step {step}: without {name} ({how}), cost {cost:.4g}")

    say(f"prune {j.name}: {len(j.valued_parts)} parts, refits of {budget or 600} evaluations")
    pr = api.prune(system, dict(zip(system.part_names, values)), budget=budget, seed=seed,
                   max_increase=max_increase / 100, workers=workers, progress=progress)
    files = pr.save(out, plots=not no_plots)
    if len(pr.steps) == 1:
        say("  nothing to remove: every removal leaves no legal netlist, or every part has keep = true")
    say(f"  {'step':>4} {'parts':>5} {'removed':<10} {'how':<6} {'cost':>10} {'rms dB':>7} {'worst dB':>8}")
    for r in pr.steps:
        mark = "  <- chosen" if r["step"] == pr.chosen else ""
        say(f"  {r['step']:>4} {r['parts']:>5} {r['removed']:<10} {r['how']:<6} {r['cost']:>10.4g} "
            f"{r['rms_error_db']:>7.2f} {r['max_error_db']:>8.2f}{mark}")
    say(f"  chosen: {pr.steps[pr.chosen]['parts']} parts, within {max_increase:g} % of step 0's cost; "
        f"{pr.evaluations} evaluations in {time.perf_counter() - t0:.1f} s")
    _findings(pr.design)
    _cautions(pr.design.system, pr.design.scored)
    say("wrote " + ", ".join(str(p) for p in files))


# ----------------------------------------------------------------------------- batch


def _print_summary(rows: list[dict]) -> None:
    say(f"  {'job':<36} {'status':<8} {'stage':<7} {'cost':>9} {'rms dB':>7} {'worst dB':>8} {'|Z| min':>8} "
        f"{'yield':>6}  swept")
    for r in rows:
        def num(x, fmt):
            return format(x, fmt) if isinstance(x, (int, float)) else "-"

        swept = ", ".join(f"{k}={v}" for k, v in sorted(r.get("swept", {}).items()))
        yld = f"{r['yield_band'] * 100:5.1f}%" if isinstance(r.get("yield_band"), (int, float)) else "-"
        say(f"  {r['job'][:36]:<36} {r['status']:<8} {r['stage'] or '-':<7} {num(r['cost'], '9.4g'):>9} "
            f"{num(r['rms_error_db'], '7.2f'):>7} {num(r['max_error_db'], '8.2f'):>8} "
            f"{num(r['impedance_min_ohm'], '8.2f'):>8} {yld:>6}  {swept}" + (f"  {r['error'][:60]}" if r["error"] else ""))


@app.command()
def batch(jobs: Optional[list[str]] = typer.Argument(None, help="Job files or globs (quote globs)."),
          out: Optional[Path] = typer.Option(None, "--out", "-o", help="Folder for results.sqlite and one folder per job."),
          stages: str = typer.Option("fit,snap,spread", "--stages", help="Comma-separated: fit, snap, spread."),
          workers: Optional[int] = typer.Option(None, "--workers", min=1, help="Local worker processes (default: cores)."),
          scheduler: Optional[str] = typer.Option(None, "--scheduler", help="A running Dask scheduler, tcp://HOST:PORT."),
          summary: Optional[Path] = typer.Option(None, "--summary", help="Only print (and rewrite) the summary of DIR."),
          no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNGs."),
          ) -> None:
    """Run many jobs unattended and resumably: results.sqlite, one folder per job, summary.csv."""
    from xo_fit.batch.runner import run_batch, write_summary

    if summary is not None:
        if not (summary / "results.sqlite").exists():
            raise XoFitError("no results.sqlite here: not a batch folder", path=summary)
        rows = write_summary(summary)
        say(f"batch {summary}: {len(rows)} jobs, sorted by cost (also in {summary / 'summary.csv'})")
        _print_summary(rows)
        return
    if not jobs or out is None:
        raise XoFitError("give job files and --out DIR (or --summary DIR)", key="batch")
    stage_list = [x.strip() for x in stages.split(",") if x.strip()]
    label = "batch"
    enabled = sys.stderr.isatty() and not OUT.quiet

    def progress(done: int, failed: int, running: int, total: int, t0: float) -> None:
        if not enabled:
            return
        finished = done + failed
        elapsed = time.time() - t0
        eta = elapsed / finished * (total - finished) if finished else float("nan")
        sys.stderr.write(f"\r{label}: {done} done, {failed} failed, {running} running of {total}"
                         + (f", about {eta:.0f} s left " if finished else " "))
        sys.stderr.flush()

    t0 = time.perf_counter()
    rep = run_batch(jobs, out, stage_list, workers=workers, scheduler=scheduler, plots=not no_plots,
                    progress=progress)
    if enabled:
        sys.stderr.write("\n")
    say(f"batch {out}: {rep.total} jobs; {rep.skipped} already done, {rep.done} run now, {rep.failed} failed; "
        f"{time.perf_counter() - t0:.1f} s")
    _print_summary(rep.summary)
    if rep.failed:
        raise typer.Exit(1)


# ----------------------------------------------------------------------------- report and export


@app.command()
def report(results: list[Path] = typer.Argument(..., help="result.json files (or their folders); overlaid."),
           out: Path = typer.Option(..., "--out", "-o", help="Folder for report.html and its PNGs.")) -> None:
    """A self-contained HTML page: curves against the targets, phase, group delay, impedance, metrics, part list with
    stresses, cautions."""
    from xo_fit.api import write_report

    t0 = time.perf_counter()
    page = write_report(list(results), out, ["xo-fit", *sys.argv[1:]])
    say(f"report of {len(results)} result(s) in {time.perf_counter() - t0:.2f} s: {page}")


@app.command()
def export(result: Path = typer.Argument(..., help="A result.json (or its folder)."),
           spice: Path = typer.Option(..., "--spice", help="The SPICE netlist file to write.")) -> None:
    """Write a design as a SPICE netlist (drivers as subcircuits) for any circuit simulator."""
    from xo_fit.output.design import load_result
    from xo_fit.output.spice import export as write_spice

    d = load_result(result)
    d = getattr(d, "design", d)
    system = d.system
    deck = write_spice(system, d.array, spice, f"{system.job.name} ({d.stage})")
    say(f"wrote {spice}; `ngspice -b {spice.name}` runs it, prints the driver voltages and input impedance and "
        f"writes {deck.data_file}")
    for note in deck.notes:
        say(f"  {note}")


@app.command()
def driver(impedance: Path = typer.Argument(..., help="A measured impedance file (Hz, ohm, optional phase in deg)."),
           model: str = typer.Option("ts", "--model", help="ts (Small's model) or ts-lossy (with L2 || R2)."),
           name: Optional[str] = typer.Option(None, "--name", help="The driver's name in the TOML printed "
                                                                  "(default: from the file name).")) -> None:
    """Fit an equivalent circuit to a measured impedance; print its parameters, the fit error and the TOML to paste."""
    import re

    from xo_fit.physics.impedance_fit import MODELS, fit_impedance
    from xo_fit.io.measure import read_curve
    from xo_fit.units import format_value

    if model not in MODELS:
        raise XoFitError(f"expected one of {', '.join(MODELS)}, got {model!r}", key="--model")
    curve = read_curve(impedance, "impedance")
    fit = fit_impedance(curve, model)
    for w in fit.warnings:
        warn(w)
    p = fit.params
    lo, hi = fit.f_range
    say(f"{impedance}: {curve.frequency.size} points, {format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, "
        + ("with phase: the complex impedance fitted" if fit.used_phase else "no phase: |Z| alone fitted"))
    say(f"model {model}: " + ("Small's model (Re, Le, fs, Qms, Qes)" if model == "ts"
                              else "Small's model with a lossy voice coil (Le, then L2 with R2 across it)"))
    rows = [("Re", format_value(p.re, "ohm", 4)), ("Le", format_value(p.le, "H", 4)),
            ("fs", format_value(p.fs, "Hz", 4)), ("Qms", f"{p.qms:.4g}"), ("Qes", f"{p.qes:.4g}"),
            ("Qts", f"{fit.qts:.4g}")]
    if model == "ts-lossy":
        rows += [("L2", format_value(p.l2, "H", 4)), ("R2", format_value(p.r2, "ohm", 4))]
    for k, v in rows:
        say(f"  {k:<4} {v}")
    say(f"fit error: {fit.rms_error_pct:.2f} % rms of |Z| over {fit.points} points (log-spaced), at most "
        f"{fit.max_error_pct:.2f} % at {format_value(fit.max_error_hz, 'Hz')}")
    label = name if name is not None else re.sub(r"[^A-Za-z0-9_-]", "_", impedance.stem) or "NAME"
    if not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", label):
        raise XoFitError(f"a driver name is 1-64 letters, digits, '_' or '-', got {label[:40]!r}", key="--name")
    say("")
    say("# the impedance to paste into a job (replacing the driver's impedance = ...):")
    say(fit.toml(label).rstrip("\n"))


# ----------------------------------------------------------------------------- demo


@app.command()
def demo(out: Path = typer.Option(..., "--out", "-o", help="Folder for the scenario and its results.")) -> None:
    """The invented two-way scenario end to end: write its measurement files and job, simulate the hand design,
    fit, snap the fit to purchasable values, spread the snapped design over 5 % part tolerances, and write the
    report (DIR/report/report.html)."""
    from xo_fit.demo import write_scenario

    job = write_scenario(out / "scenario")
    say(f"wrote the demo scenario: {job} and its measurement files in {job.parent / 'data'}")
    say("the tweeter's response is gated from 300 Hz and extended below by a fitted 2nd-order high-pass (check):")
    check(job=job)
    say("an equivalent circuit fitted to the woofer's measured impedance (xo-fit driver FILE --model ts-lossy):")
    driver(impedance=job.parent / "data" / "woofer-impedance.txt", model="ts-lossy", name="woofer")
    say("hand design (textbook starting values):")
    simulate(job=job, out=out / "hand-design", from_=None, no_plots=False)
    say("fit:")
    fit(job=job, out=out / "fit", budget=None, seed=None, optimizer=None, time_limit=None, workers=1, no_plots=False)
    import json

    over = [(name, e) for name, e in (json.loads((out / "fit" / "result.json").read_text()).get("stress") or {}).items()
            if e.get("within_rating") is False]
    for name, e in over:
        figure = f"{e['programme_w']:.3g} W programme" if "programme_w" in e else f"{e['figure']:.3g} {e['unit']} peak"
        say(f"  the demo fits for accuracy alone, so {name} ends over its rating ({figure}, rated {e['rating']:g} "
            f"{e['unit']}): add `stress = 10` to the job's [cost] and fit again to keep it within, at some cost "
            "in accuracy")
    say("snap to purchasable values (E12 coils and capacitors, E24 resistors):")
    snap(job=job, out=out / "snap", from_=out / "fit", series=None, inventory=None, combine=None, top_up=None,
         no_plots=False)
    say("tolerance spread of the snapped design:")
    spread(job=job, out=out / "spread", from_=out / "snap", samples=None, seed=None, no_plots=False)
    say("SPICE deck of the snapped design (measured drivers as circuits fitted to their impedance):")
    export(result=out / "snap", spice=out / "snap" / "deck.cir")
    from xo_fit.api import write_report

    page = write_report([out / "fit", out / "snap", out / "spread"], out / "report", ["xo-fit", *sys.argv[1:]])
    say(f"report: {page.resolve()}")


# ----------------------------------------------------------------------------- entry point


def run() -> None:
    """Console entry point: run, then exit even if a library left a non-daemon thread behind.

    (nevergrad's NGOpt, failing under numpy >= 2.4, leaves such a thread, which would keep the
    process alive after the command has finished.)
    """
    import os
    import threading

    code = main()
    stray = [t for t in threading.enumerate() if t is not threading.main_thread() and t.is_alive() and not t.daemon]
    sys.stdout.flush()
    sys.stderr.flush()
    if stray:
        os._exit(code)
    sys.exit(code)


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
