"""`xo-fit demo`: the invented scenario end to end, through the same commands a user runs."""

from __future__ import annotations

import sys
from pathlib import Path

import typer

from xo_fit.cli.base import app
from xo_fit.cli.console import say
from xo_fit.cli.designs import fit, simulate, snap, spread
from xo_fit.cli.files import export
from xo_fit.cli.prepare import check, driver


def baffle_figures(job: Path) -> str:
    """The demo woofer's baffle step in a few words: its diffraction on the axis at 40 Hz and where it is -3 dB."""
    import numpy as np

    from xo_fit.demo import woofer_diffraction

    f = np.geomspace(40.0, 2000.0, 200)
    db = 20 * np.log10(np.abs(woofer_diffraction(f, [("h", 0)])[0]))
    half = f[np.argmax(db > -3.0103)]
    return f"on the axis {db[0]:+.1f} dB at 40 Hz, -3 dB at {half:.0f} Hz, {db.max():+.1f} dB at most"


@app.command()
def demo(out: Path = typer.Option(..., "--out", "-o", help="Folder for the scenario and its results.")) -> None:
    """The invented two-way scenario end to end: write its measurement files and job, simulate the hand design,
    fit (with the predicted preference score of both), snap the fit to purchasable values, spread the snapped design
    over 5 % part tolerances, and write the report (DIR/report/report.html)."""
    from xo_fit.demo import write_scenario

    job = write_scenario(out / "scenario")
    say(f"wrote the demo scenario: {job} and its measurement files in {job.parent / 'data'}")
    say("the tweeter's response is gated from 300 Hz and extended below by a fitted 2nd-order high-pass; the drivers' "
        "positions are in the job (the woofer 150 mm below the tweeter, 18 mm deeper) and their angle files are "
        "measured about each driver (about = \"driver\"), so every sum adds each driver's path from its "
        "acoustic centre: the vertical lobing comes from the geometry (check):")
    say(f"the woofer's near field holds no baffle step: spliced at 400 Hz with baffle = true, it takes the cabinet's "
        f"diffraction at every position first ({baffle_figures(job)}; `xo-fit baffle` writes it):")
    check(job=job)
    say("an equivalent circuit fitted to the woofer's measured impedance (xo-fit driver FILE --model ts-lossy):")
    driver(impedance=job.parent / "data" / "woofer-impedance.txt", model="ts-lossy", name="woofer", volume=None)
    say("hand design (textbook starting values):")
    simulate(job=job, out=out / "hand-design", from_=None, no_plots=False)
    say("fit:")
    fit(job=job, out=out / "fit", budget=None, seed=None, optimizer=None, time_limit=None, workers=1, no_plots=False)
    import json

    scores = [(json.loads((out / d / "result.json").read_text()).get("preference") or {}).get("score")
              for d in ("hand-design", "fit")]
    if all(x is not None for x in scores):
        say(f"  predicted preference (Olive 2004, from the ANSI/CTA-2034-A curves): hand design {scores[0]:.2f}, "
            f"fit {scores[1]:.2f}; `preference = W` in the job's [cost] makes the fit raise it")
    over = [(name, e) for name, e in (json.loads((out / "fit" / "result.json").read_text()).get("stress") or {}).items()
            if e.get("within_rating") is False]
    for name, e in over:
        figure = f"{e['programme_w']:.3g} W programme" if "programme_w" in e else f"{e['figure']:.3g} {e['unit']} peak"
        say(f"  the demo fits for accuracy alone, so {name} ends over its rating ({figure}, rated {e['rating']:g} "
            f"{e['unit']}): add `stress = 10` to the job's [cost] and fit again to keep it within, at some cost "
            "in accuracy")
    say("snap to purchasable values (E12 coils and capacitors, E24 resistors):")
    snap(job=job, out=out / "snap", from_=out / "fit", series=None, inventory=None, combine=None, top_up=None,
         speakers=2, no_plots=False)
    say("tolerance spread of the snapped design:")
    spread(job=job, out=out / "spread", from_=out / "snap", samples=None, seed=None, no_plots=False)
    say("SPICE deck of the snapped design (measured drivers as circuits fitted to their impedance):")
    export(result=out / "snap", spice=out / "snap" / "deck.cir")
    from xo_fit.api import write_report

    page = write_report([out / "fit", out / "snap", out / "spread"], out / "report", ["xo-fit", *sys.argv[1:]])
    say(f"report: {page.resolve()}")
