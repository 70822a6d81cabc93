"""Console output of the commands: quiet/verbose state, warnings, progress, scores, findings, cautions."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import typer

from xo_fit.errors import printable


class Output:
    """The command line's output state, set by the global options: ``quiet`` (``-q``: say nothing but
    warnings and errors), ``verbose`` (``-v``: timings and paths) and ``noted`` (the command has already said on
    stderr that it was interrupted and what it kept)."""
    quiet = False
    verbose = False
    noted = False  # the command has said on stderr that it was interrupted, and what it kept


OUT = Output()


def say(text: str = "") -> None:
    """Print ``text`` on stdout, control characters escaped, unless ``-q`` is given."""
    if not OUT.quiet:
        typer.echo(printable(text))


def warn(text: str) -> None:
    """Print ``warning: text`` on stderr (also under ``-q``), control characters escaped."""
    typer.echo(f"warning: {printable(text)}", err=True)


def load_design(job_path: Path, from_: Path | None):
    """The loaded system and a design (P,): the job's own values, or those of a result (--from)."""
    from xo_fit.io.results import read_result, result_values

    system = load_checked(job_path)
    overrides = None
    if from_ is not None:
        overrides = result_values(read_result(from_), system.part_names, from_)
    return system, system.values(overrides)


def part_info_of(from_: Path | None) -> dict:
    """What a result says of each part beyond its value (a snap's series, source and combination)."""
    if from_ is None:
        return {}
    from xo_fit.io.results import read_result
    from xo_fit.output.loading import part_extras

    return part_extras(read_result(from_)["parts"])


def load_checked(job_path: Path):
    """The job at ``job_path`` read and its data loaded into a System, its load warnings printed (with
    ``-v``, also the load time and the kernel cache folder).

    Raises XoFitError for a bad job or bad data (the command then exits 2).
    """
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


def print_score(s, start_cost: float | None = None) -> None:
    """Print a scored design's cost and its terms (with ``start_cost``, the cost before the search), its
    error against the target in dB, the phase mismatch in degrees, its level in dB SPL, its impedance minimum in
    ohm and Hz, the off-axis figures and the predicted preference where they were computed."""
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
    if getattr(s, "preference", None):
        say("  " + preference_text(s.preference))


def preference_text(p: dict) -> str:
    """One line of a design's predicted preference (result.json's ``preference``): the score and its four parts."""
    def fig(name, fmt):
        return "-" if p.get(name) is None else format(p[name], fmt)

    lfx = "-" if p.get("lfx") is None else f"{p['lfx']:.3f} ({10 ** p['lfx']:.0f} Hz)"
    why = p.get("reasons", {})
    first = next(iter(why.items()), None)
    note = f" [{first[0]}: {first[1]}]" if first else ""
    return (f"predicted preference (Olive): score {fig('score', '.2f')}, with an ideal subwoofer "
            f"{fig('score_with_sub', '.2f')}; NBD on axis {fig('nbd_on', '.3f')} dB, NBD in room "
            f"{fig('nbd_pir', '.3f')} dB, LFX {lfx}, SM in room {fig('sm_pir', '.3f')}{note}")


def print_limits(design) -> None:
    """The design against the job's [limits], one line each (first, before the scores)."""
    from xo_fit.output.limits import limit_lines

    for line in limit_lines(design.hard_limits):
        say(f"  limit {line}")


def print_findings(design) -> None:
    """Print where the design's error lies (each way's and each crossover's rms and worst error, dB and
    Hz) and its findings, one line each."""
    b = design.breakdown
    if b is not None:
        parts = [f"{w['way']} {w['rms_db']:.2f} dB rms, worst {w['worst_db']:+.2f} dB at {w['worst_hz']:.0f} Hz"
                 for w in b["ways"]]
        parts += [f"crossover {c['ways']} ({c['from_hz']:.0f}-{c['to_hz']:.0f} Hz): sum {c['sum_rms_db']:.2f} dB rms, "
                  f"phase worst {c['phase_worst_deg']:+.1f} deg at {c['phase_worst_hz']:.0f} Hz"
                  for c in b["crossovers"]]
        say("  where the error lies: " + "; ".join(parts))
    for f in design.findings:
        say(f"  finding ({f['kind']}): {f['text']}")


def print_cautions(system, s) -> None:
    """Print the design's part stresses at the job's ``[stress]`` drive (W into ohm) with the drivers'
    protection, and the cautions that follow; without ``[stress]`` only the cautions on the impedance minimum."""
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
        notes = print_protection(system, s) + notes
    else:
        notes = load_cautions(s.metrics["impedance_min_ohm"], system.job.cost.impedance_min)
    for c in notes:
        say(f"  caution: {c}")


def print_protection(system, s) -> list[str]:
    """Print each protected driver's excursion and power at the [stress] drive; return their cautions."""
    from xo_fit.model.protection import protection
    from xo_fit.output.cautions import protection_cautions

    spec = system.job.stress
    prot = protection(system, s.sim.voltages)
    if not prot:
        return []
    say(f"  drivers at {spec.power:g} W into {spec.rated_impedance:g} ohm (sine excursion, programme power, over the "
        "band):")
    for name, p in prot.items():
        x = ("excursion undetermined (give sd)" if p["excursion_mm"] is None else
             f"excursion {p['excursion_mm']:.3g} mm at {p['at_hz']:.0f} Hz"
             + (f" (xmax {p['xmax_mm']:.3g} mm)" if p["xmax_mm"] is not None else ""))
        w = f"power {p['power_w']:.3g} W" + (f" (rated {p['rating_w']:g} W)" if p["rating_w"] is not None else "")
        say(f"    {name:<8} {x}, {w}: {'within' if p['within'] else 'OVER'}")
    return protection_cautions(prot, spec)


class Progress:
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
        """End the progress line (a line break) if one was shown."""
        if self.shown:
            sys.stderr.write("\n")
            sys.stderr.flush()


def print_summary(rows: list[dict]) -> None:
    """Print a batch summary table: one row per job (status, stage, cost, rms and worst error in dB, impedance
    minimum in ohm, yield in %, the swept values and the start of any error)."""
    say(f"  {'job':<36} {'status':<8} {'stage':<7} {'cost':>9} {'rms dB':>7} {'worst dB':>8} {'|Z| min':>8} "
        f"{'yield':>6}  swept")
    for r in rows:
        def num(x, fmt):
            return format(x, fmt) if isinstance(x, (int, float)) else "-"

        swept = ", ".join(f"{k}={v}" for k, v in sorted(r.get("swept", {}).items()))
        yld = f"{r['yield_band'] * 100:5.1f}%" if isinstance(r.get("yield_band"), (int, float)) else "-"
        say(f"  {r['job'][:36]:<36} {r['status']:<8} {r['stage'] or '-':<7} {num(r['cost'], '9.4g'):>9} "
            f"{num(r['rms_error_db'], '7.2f'):>7} {num(r['max_error_db'], '8.2f'):>8} "
            f"{num(r['impedance_min_ohm'], '8.2f'):>8} {yld:>6}  {swept}"
            + (f"  {r['error'][:60]}" if r["error"] else ""))
