"""Commands that compute a design: simulate, fit, snap, spread, prune."""

from __future__ import annotations

import time
from pathlib import Path
from typing import TYPE_CHECKING, cast

import numpy as np
import typer

from xo_fit.cli.base import app
from xo_fit.cli.console import (
    OUT,
    Progress,
    load_checked,
    load_design,
    part_info_of,
    print_cautions,
    print_findings,
    print_limits,
    print_score,
    say,
    warn,
)
from xo_fit.config import COST_FLOOR, MAX_INCREASE, REFIT_BUDGET
from xo_fit.errors import XoFitError
from xo_fit.io.results import check_folder
from xo_fit.job.model import DEFAULTS

if TYPE_CHECKING:
    from xo_fit.search.fitting import FitOutcome
    from xo_fit.stages.snapping import SnapOutcome


@app.command()
def simulate(job: Path = typer.Argument(..., help="The job file (TOML)."),
             out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv and plots."),
             from_: Path | None = typer.Option(None, "--from",
                                               help="A result.json (or its folder) whose values to use."),
             no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG (faster)."),
             ) -> None:
    """Evaluate the job's own values (a hand design), or those of a result, and write the curves."""
    from xo_fit import api

    check_folder(out, "--out")
    t0 = time.perf_counter()
    system, values = load_design(job, from_)
    j = system.job
    d = api.simulate(system, dict(zip(system.part_names, values)))
    d.source["from"] = str(from_) if from_ else None
    files = d.save(out, plots=not no_plots, title=f"{j.name}: simulated")
    s = d.scored
    say(f"simulated {j.name}: {len(s.values)} part values, {system.frequencies.size} points "
        f"in {time.perf_counter() - t0:.2f} s")
    print_limits(d)
    print_score(s)
    print_findings(d)
    print_cautions(system, s)
    say("wrote " + ", ".join(str(p) for p in files))


@app.command()
def fit(job: Path = typer.Argument(..., help="The job file (TOML)."),
        out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv and plots."),
        budget: int | None = typer.Option(None, "--budget", min=1, max=10**9,
                                          help="Cost evaluations (default: the job's \\[search] budget, "
                                               f"else {DEFAULTS['search']['budget']})."),
        seed: int | None = typer.Option(None, "--seed", min=0,
                                        help="Random seed (default: the job's \\[search] seed, "
                                             f"else {DEFAULTS['search']['seed']})."),
        optimizer: str | None = typer.Option(None, "--optimizer",
                                                help="auto, de, scipy-de or ng-NAME (a nevergrad optimizer)."),
        time_limit: float | None = typer.Option(None, "--time-limit", min=0.0,
                                                   help="Stop after this many seconds and keep the best so far."),
        workers: int = typer.Option(1, "--workers", min=1, max=64,
                                    help="Processes sharing the budget as islands, each searching from a seed "
                                         "derived from the job's; the best basins of all are polished side by "
                                         "side, the best design wins and the result names its seed."),
        no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG (faster)."),
        ) -> None:
    """Search the free part values that best meet the job's acoustic target, then polish locally."""
    from xo_fit.batch.tasks import fit_stage

    check_folder(out, "--out")
    t0 = time.perf_counter()
    system = load_checked(job)
    j = system.job
    progress = Progress(f"fit {j.name}") if workers == 1 else None
    try:
        st = fit_stage(system, out, optimizer=optimizer, budget=budget, seed=seed, time_limit=time_limit,
                       workers=workers, plots=not no_plots, progress=progress)
    finally:
        if progress is not None:
            progress.close()
    outcome, runs, files = cast("FitOutcome", st.design.outcome), st.design.runs, st.files
    r = outcome.search
    state = "" if r.complete else f" - INCOMPLETE ({r.stopped_by}): the best design so far"
    total = st.document.get("search", {}).get("evaluations", r.evaluations)  # all processes together
    say(f"fit {j.name}: {total} evaluations with {r.optimizer} (seed {r.seed}) in {r.seconds:.2f} s "
        f"of search, {time.perf_counter() - t0:.2f} s in all{state}")
    print_limits(st.design)
    print_score(outcome.scored, outcome.start_cost)
    if runs is not None:
        say(f"  {len(runs)} processes shared the budget; seed {r.seed} won: "
            + ", ".join(f"seed {x['seed']}: {x['cost']:.4g}" for x in runs))
    if r.basins:
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
    print_findings(st.design)
    print_cautions(system, outcome.scored)
    say("wrote " + ", ".join(str(p) for p in files))
    if not r.complete and r.stopped_by == "interrupted":
        typer.echo(f"xo-fit: interrupted; the best design so far is in {out / 'result.json'}", err=True)
        OUT.noted = True
        raise typer.Exit(130)
    if not r.complete and r.stopped_by and r.stopped_by.startswith("optimizer failed"):
        typer.echo(f"xo-fit: {r.stopped_by}; the best design so far is in {out / 'result.json'}", err=True)
        raise typer.Exit(1)


def series_option(text: str | None) -> dict | None:
    """--series "E24" (every kind) or "L=E12,C=E24,R=E96"."""
    if text is None:
        return None
    from xo_fit.series import check_name

    try:
        if "=" not in text:
            name = check_name(text)
            return {"R": name, "L": name, "C": name}
        out = {}
        for item in text.split(","):
            kind, _, name = item.partition("=")
            kind = kind.strip().upper()
            if kind not in ("R", "L", "C") or not name.strip():
                raise XoFitError(f"expected a series name or KIND=NAME pairs such as L=E12,C=E24, got {text!r}")
            out[kind] = check_name(name.strip())
        return out
    except XoFitError as e:
        raise XoFitError(e.message, key="--series") from None


@app.command()
def snap(job: Path = typer.Argument(..., help="The job file (TOML)."),
         out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, response.csv, parts.csv, plots."),
         from_: Path | None = typer.Option(None, "--from", help="A result.json (e.g. a fit's) whose values to snap."),
         series: str | None = typer.Option(None, "--series", help='A series for every kind ("E24"), or "L=E12,C=E24".'),
         inventory: Path | None = typer.Option(None, "--inventory",
                                               help="A CSV of parts on hand: kind, value \\[, count] "
                                                    "(default: the job's \\[snap] inventory)."),
         combine: int | None = typer.Option(None, "--combine", min=1, max=2,
                                               help="2: allow two parts to make one value."),
         top_up: str | None = typer.Option(None, "--top-up",
                                              help="With an inventory: a series to buy from where the drawer lacks "
                                                   "a value (default: the job's \\[snap] top_up)."),
         speakers: int = typer.Option(2, "--speakers", min=1, max=10000,
                                      help="Speakers to buy parts for: the quantities of bom.csv."),
         no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG."),
         ) -> None:
    """Move every part value to a purchasable one (a series or parts on hand) and re-score, searching the
    combinations with the real cost; writes the parts to buy for --speakers speakers (bom.csv)."""
    from xo_fit.batch.tasks import snap_stage
    from xo_fit.constants import PART_UNIT
    from xo_fit.io.inventory import read_inventory
    from xo_fit.units import format_value

    check_folder(out, "--out")
    overrides = series_option(series)
    if top_up is not None:
        from xo_fit.series import check_name

        try:
            top_up = check_name(top_up)
        except XoFitError as e:
            raise XoFitError(e.message, key="--top-up") from None
    t0 = time.perf_counter()
    system, continuous = load_design(job, from_)
    j = system.job
    inv_path = inventory if inventory is not None else j.snap.inventory
    inv = read_inventory(inv_path) if inv_path is not None else None
    st = snap_stage(system, out, continuous, series_override=overrides, inventory=inv, combine=combine,
                    plots=not no_plots, source_from=str(from_) if from_ else None, top_up=top_up,
                    speakers=speakers)
    outcome, before, after, files = cast("SnapOutcome", st.design.outcome), st.design.before, st.design.scored, st.files
    assert before is not None  # a snap keeps the continuous design it started from
    sr = outcome.search
    say(f"snapped {j.name}: {sum(p.source not in ('fixed', 'continuous') for p in outcome.parts)} parts, "
        f"{sr.evaluations if sr else 0} designs scored ({'exhaustive' if sr and sr.exhaustive else 'searched'}) "
        f"in {outcome.seconds:.2f} s, {time.perf_counter() - t0:.2f} s in all")
    print_limits(st.design)
    say(f"  {'part':<8} {'continuous':>12} {'snapped':>22} {'change':>8}  source")
    for sp in outcome.parts:
        unit = PART_UNIT[sp.kind]
        shown = sp.choice.describe(unit) if sp.choice is not None else format_value(sp.value, unit)
        change = (sp.value / sp.continuous - 1) * 100
        say(f"  {sp.name:<8} {format_value(sp.continuous, unit):>12} {shown:>22} {change:>+7.1f}%  {sp.source}")
    if before.cost is not None:
        say(f"  cost: continuous {before.cost:.4g}, "
            f"log-nearest rounding {st.document['snap']['log_nearest_cost']:.4g}, snapped {after.cost:.4g}")
        for label, sc in (("continuous", before), ("snapped", after)):
            m = sc.metrics
            say(f"  {label:<10} rms {m['rms_error_db']:.2f} dB, worst {m['max_error_db']:.2f} dB, "
                f"phase {m['phase_mismatch_deg']:.1f} deg, |Z| min {m['impedance_min_ohm']:.2f} ohm")
    from xo_fit.stages.snapping import snap_warnings

    for w in snap_warnings(outcome, before.cost, after.cost, inv is not None):
        warn(w)
    print_findings(st.design)
    print_cautions(system, after)
    say("wrote " + ", ".join(str(p) for p in files))


@app.command()
def spread(job: Path = typer.Argument(..., help="The job file (TOML)."),
           out: Path = typer.Option(..., "--out", "-o", help="Folder for result.json, spread.csv and plots."),
           from_: Path | None = typer.Option(None, "--from", help="A result.json (fit or snap) whose design to use."),
           samples: int | None = typer.Option(None, "--samples", min=1, max=10**8,
                                              help="Tolerance draws (default: the job's \\[spread] samples, "
                                                   f"else {DEFAULTS['spread']['samples']})."),
           seed: int | None = typer.Option(None, "--seed", min=0,
                                           help="Random seed (default: the job's \\[spread] seed, "
                                                f"else {DEFAULTS['spread']['seed']})."),
           no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNG."),
           ) -> None:
    """Tolerance Monte Carlo of a design: level percentiles, yield, sensitivity per part, worst cases, pair matching."""
    from xo_fit.batch.tasks import spread_stage

    check_folder(out, "--out")
    t0 = time.perf_counter()
    system, nominal = load_design(job, from_)
    j = system.job
    bar = Progress(f"spread {j.name}", units="builds", figure="share within the band so far")

    def progress(done: int, total: int, share: float) -> None:
        bar(done, total, share)

    try:
        st = spread_stage(system, out, nominal, samples=samples, seed=seed, plots=not no_plots,
                          source_from=str(from_) if from_ else None, progress=progress, part_info=part_info_of(from_))
    finally:
        bar.close()
    assert st.spread is not None and st.spread.result is not None  # a spread computed here
    r, files = st.spread.result, st.files
    say(f"spread {j.name}: {r.samples} builds ({j.spread.distribution}"
        f"{', quasi-random' if j.spread.qmc else ''}) in {time.perf_counter() - t0:.2f} s")
    say(f"  yield: {r.yield_band * 100:.1f} % within +-{r.limits['band_db']:g} dB of the nominal sum; "
        f"{r.yield_limits * 100:.1f} % meet rms <= {r.limits['rms_error_db']:g} dB"
        + (f" and |Z| >= {r.limits['impedance_min_ohm']:g} ohm" if r.limits["impedance_min_ohm"] > 0 else ""))
    m = st.design.metrics
    misses = []
    if m.get("rms_error_db") is not None and m["rms_error_db"] > r.limits["rms_error_db"]:
        misses.append(f"its rms error is {m['rms_error_db']:.2f} dB (limit {r.limits['rms_error_db']:g} dB)")
    if r.limits["impedance_min_ohm"] > 0 and m["impedance_min_ohm"] < r.limits["impedance_min_ohm"]:
        misses.append(f"its |Z| falls to {m['impedance_min_ohm']:.2f} ohm "
                      f"(floor {r.limits['impedance_min_ohm']:g} ohm)")
    if misses:
        say("  the nominal design itself misses the limits: " + "; ".join(misses)
            + (" (so few builds or none can meet them: fit or snap the design first, or relax [spread] rms_limit_db)"
               if from_ is None else " (so few builds or none can meet them: relax [spread] rms_limit_db, or fit "
               "again with the limits as [limits] or heavier [cost] weights)"))
    say(f"  worst build: {r.worst_deviation_db:.2f} dB off at {r.worst_at_hz:.0f} Hz; worst corner "
        f"{r.corners['worst_deviation_db']:.2f} dB ({r.corners['method']})")
    say(f"  left/right matching: largest difference p50 {r.pair_p50_db:.2f} dB, p95 {r.pair_p95_db:.2f} dB")
    say("  most sensitive parts (dB per +1 %, worst over the band):")
    for row in r.sensitivity[:5]:
        say(f"    {row['part']:<8} {row['db_per_pct']:+.3f} dB/% at {row['worst_at_hz']:.0f} Hz "
            f"(tolerance {row['tolerance_pct']:g} %)")
    say("wrote " + ", ".join(str(p) for p in files))


@app.command()
def prune(job: Path = typer.Argument(..., help="The job file (TOML)."),
          out: Path = typer.Option(..., "--out", "-o", help="Folder for prune.csv, job.toml, result.json and plots."),
          from_: Path | None = typer.Option(None, "--from", help="A result.json (e.g. a fit's) to start from "
                                            "(default: the job's values, fitted first)."),
          budget: int | None = typer.Option(None, "--budget", min=1, max=10**9,
                                               help=f"Cost evaluations per refit at most (default {REFIT_BUDGET})."),
          seed: int | None = typer.Option(None, "--seed", min=0,
                                          help="Seed of the fit that comes first without --from (default: the "
                                               "job's \\[search] seed); the refits draw no random numbers."),
          max_increase: float = typer.Option(100 * MAX_INCREASE, "--max-increase", min=0.0,
                                             help="Largest cost increase over step 0 for the chosen design, %."),
          workers: int = typer.Option(1, "--workers", min=1, max=64, help="Processes for the trial removals."),
          no_plots: bool = typer.Option(False, "--no-plots", help="Skip the PNGs."),
          ) -> None:
    """Remove, one at a time, the part whose removal costs least (open or short, the rest refitted); keep the
    smallest design within --max-increase of the start."""
    from xo_fit import api

    check_folder(out, "--out")
    t0 = time.perf_counter()
    # without --from the job's values are fitted first: a free part may have only its range
    system, values = load_design(job, from_) if from_ is not None else (load_checked(job), None)
    j = system.job

    def progress(step: int, name: str, how: str, cost: float) -> None:
        say(f"  step {step}: without {name} ({how}), cost {cost:.4g}" if step
            else f"  step 0: the start, cost {cost:.4g}")

    if seed is not None and from_ is not None:
        warn("--seed has no effect with --from: the refits are local polishes that draw no random numbers")
    say(f"prune {j.name}: {len(j.valued_parts)} parts, refits of at most {budget or REFIT_BUDGET} evaluations")
    if from_ is None and j.free_parts:
        say(f"  no --from: the job's values fitted first ([search] budget {j.search.budget}, seed "
            f"{j.search.seed if seed is None else seed})")
    pr = api.prune(system, dict(zip(system.part_names, values)) if values is not None else None, budget=budget,
                   seed=seed, max_increase=max_increase / 100, workers=workers, progress=progress)
    files = pr.save(out, plots=not no_plots)
    if len(pr.steps) == 1:
        say("  nothing to remove: every removal leaves no legal netlist, or every part has keep = true")
    say(f"  {'step':>4} {'parts':>5} {'removed':<10} {'how':<6} {'cost':>10} {'rms dB':>7} {'worst dB':>8}")
    for r in pr.steps:
        mark = "  <- chosen" if r["step"] == pr.chosen else ""
        say(f"  {r['step']:>4} {r['parts']:>5} {r['removed']:<10} {r['how']:<6} {r['cost']:>10.4g} "
            f"{r['rms_error_db']:>7.2f} {r['max_error_db']:>8.2f}{mark}")
    base = pr.steps[0]["cost"]
    of = f"of {COST_FLOOR:g}, step 0 being on target" if base is not None and base < COST_FLOOR else "of step 0's cost"
    say(f"  chosen: {pr.steps[pr.chosen]['parts']} parts, within {max_increase:g} % {of}; "
        f"{pr.evaluations} evaluations in {time.perf_counter() - t0:.1f} s")
    for t in pr.trials:
        if t.get("refused"):
            say(f"  refused at step {t['step']}: {t['removed']} ({t['how']}) breaks {', '.join(t['refused'])}")
    print_limits(pr.design)
    print_findings(pr.design)
    print_cautions(pr.design.system, pr.design.scored)
    say("wrote " + ", ".join(str(p) for p in files))
    if pr.interrupted:
        typer.echo(f"xo-fit: interrupted after step {len(pr.steps) - 1}; the best design so far is in "
                   f"{out / 'result.json'}", err=True)
        OUT.noted = True
        raise typer.Exit(130)
