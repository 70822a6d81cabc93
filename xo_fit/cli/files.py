"""Commands over many jobs or over results: batch, report, export."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import typer

from xo_fit.cli.base import app
from xo_fit.cli.console import OUT, print_summary, say, warn
from xo_fit.errors import XoFitError
from xo_fit.io.results import check_folder, check_target


@app.command()
def batch(jobs: list[str] | None = typer.Argument(None, help="Job files or globs (quote globs)."),
          out: Path | None = typer.Option(None, "--out", "-o",
                                          help="Folder for results.sqlite and one folder per job."),
          stages: str = typer.Option("fit,snap,spread", "--stages", help="Comma-separated: fit, snap, spread."),
          workers: int | None = typer.Option(None, "--workers", min=1, help="Local worker processes (default: cores)."),
          scheduler: str | None = typer.Option(None, "--scheduler", help="A running Dask scheduler, tcp://HOST:PORT."),
          summary: Path | None = typer.Option(None, "--summary", help="Only print (and rewrite) the summary of DIR."),
          no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNGs."),
          ) -> None:
    """Run many jobs unattended and resumably: results.sqlite, one folder per job, summary.csv."""
    from xo_fit.batch.runner import BatchStopped, run_batch, write_summary

    if summary is not None:
        if not (summary / "results.sqlite").exists():
            raise XoFitError("no results.sqlite here: not a batch folder", path=summary)
        try:
            rows = write_summary(summary)
        except BatchStopped as e:
            typer.echo(f"xo-fit: {e}", err=True)
            raise typer.Exit(e.code) from None
        say(f"batch {summary}: {len(rows)} jobs, sorted by cost (also in {summary / 'summary.csv'})")
        print_summary(rows)
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
    try:
        rep = run_batch(jobs, out, stage_list, workers=workers, scheduler=scheduler, plots=not no_plots,
                        progress=progress)
    except BatchStopped as e:
        if enabled:
            sys.stderr.write("\n")
        typer.echo(f"xo-fit: {e}", err=True)
        OUT.noted = True  # the one line is said: main adds no "interrupted"
        raise typer.Exit(e.code) from None
    if enabled:
        sys.stderr.write("\n")
    report_failures(rep.failures)
    say(f"batch {out}: {rep.total} jobs; {rep.skipped} already done, {rep.done} run now, {rep.failed} failed; "
        f"{time.perf_counter() - t0:.1f} s")
    print_summary(rep.summary)
    if rep.failed:
        raise typer.Exit(1)


#: At most this many failed jobs are named on stderr after a batch (the rest: summary.csv and results.sqlite).
FAILURES_SHOWN = 20


def report_failures(failures: list[tuple[str, str, str]]) -> None:
    """Each failed job on stderr with its whole reason (a bug's traceback stays in results.sqlite)."""
    for job, stage, message in failures[:FAILURES_SHOWN]:
        lines = str(message).splitlines() or [""]
        more = " (its traceback is in results.sqlite)" if len(lines) > 1 else ""
        typer.echo(f"xo-fit: job {job!r} failed ({stage}): {lines[0]}{more}", err=True)
    if len(failures) > FAILURES_SHOWN:
        typer.echo(f"xo-fit: ... and {len(failures) - FAILURES_SHOWN} more failed jobs (see summary.csv)", err=True)


@app.command()
def report(results: list[Path] = typer.Argument(..., help="result.json files (or their folders); overlaid."),
           out: Path = typer.Option(..., "--out", "-o", help="Folder for report.html, its PNGs and bom.csv."),
           buy: Path | None = typer.Option(None, "--buy", help="The result whose parts to buy (bom.csv; default: "
                                                                  "the last snap given)."),
           speakers: int = typer.Option(2, "--speakers", min=1, max=10000,
                                        help="Speakers to buy parts for: the quantities of bom.csv."),
           ) -> None:
    """A self-contained HTML page: what to buy, curves against each result's targets, phase, group delay,
    impedance, metrics, the tolerance summary, part list with stresses, cautions; bom.csv of the parts to buy."""
    from xo_fit.api import write_report

    check_folder(out, "--out")
    t0 = time.perf_counter()
    page = write_report(list(results), out, ["xo-fit", *sys.argv[1:]], buy=buy, speakers=speakers)
    say(f"report of {len(results)} result(s) in {time.perf_counter() - t0:.2f} s: {page}")
    bom = Path(out) / "bom.csv"
    if bom.is_file():
        say(f"parts to buy for {speakers} speaker{'s' if speakers != 1 else ''}: {bom}")
    else:
        say("  no parts listed to buy: no result given is snapped (continuous values are not buyable as they are); "
             "`xo-fit snap` a design and report it, or name the result to buy from with --buy")


@app.command()
def export(result: Path = typer.Argument(..., help="A result.json (or its folder)."),
           spice: Path = typer.Option(..., "--spice", help="The SPICE netlist file to write.")) -> None:
    """Write a design as a SPICE netlist (drivers as subcircuits) for any circuit simulator."""
    from xo_fit.output.design import Spread
    from xo_fit.output.loading import load_result
    from xo_fit.output.spice import export as write_spice

    check_target(spice, "--spice")
    loaded = load_result(result)
    d = loaded.design if isinstance(loaded, Spread) else loaded
    system = d.system
    deck = write_spice(system, d.array, spice, f"{system.job.name} ({d.stage})")
    say(f"wrote {spice}; `ngspice -b {spice.name}` runs it, prints the driver voltages and input impedance and "
        f"writes {deck.data_file}")
    for note in deck.notes:
        say(f"  {note}")
    for w in deck.warnings:
        warn(w)
