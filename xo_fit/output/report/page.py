"""The report page: :func:`write_report` gathers a :class:`Report`, runs the sections of :data:`SECTIONS` in
order and writes report.html (one file: images inline), its PNGs, and bom.csv for the result bought from.

A section is a function ``section(rep) -> Markup`` (the HTML of its heading and body, "" to leave it out);
adding one to the page is adding it to :data:`SECTIONS`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from xo_fit.errors import XoFitError
from xo_fit.io.results import atomic_path
import xo_fit.output.report.parts as parts
import xo_fit.output.report.sections as sections
from xo_fit.output.report.markup import Markup, esc, join, para, tag
from xo_fit.output.report.results import ReportItem, check_alike, choose_buy, report_items
from datetime import UTC


@dataclass(eq=False)
class Report:
    """What the sections read: the results (``items``), the result to buy from (``buy``, None where none is
    snapped) with why (``buy_reason``) and its bill of materials (``bom``, bom.csv's rows), the design to build
    (``build``: the one bought from, else the last), its stress report (``stress``, None without [stress]),
    the figures (PNG bytes by name) and the network drawing (PNG bytes, None where it has no ladder layout)."""

    items: list[ReportItem]
    buy: ReportItem | None = None
    buy_reason: str = ""
    bom: list[dict] | None = None
    speakers: int = 2
    figures: dict[str, bytes] = field(default_factory=dict)
    drawing: bytes | None = None
    stress: Any = None
    made: str = ""

    @property
    def build(self) -> ReportItem:
        """The result whose network the page shows as the one to build: the one to buy from, else the last
        given."""
        return self.buy if self.buy is not None else self.items[-1]

    @property
    def job(self):
        """The first result's job (every result of a report shares its grid and drivers)."""
        return self.items[0].job


#: The page's sections, in order: the parts to buy first.
SECTIONS = [sections.limits_section, parts.buy_section, sections.metrics_section, sections.preference_section,
            sections.breakdown_section,
            sections.tolerance_section, sections.values_section, sections.targets_section, sections.curves_section,
            parts.part_list_section, parts.protection_section, parts.network_section, parts.prune_section,
            parts.findings_section, parts.cautions_section]

STYLE = """
body { font-family: sans-serif; max-width: 1100px; margin: 1.5em auto; padding: 0 1em; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; width: 100%; font-size: 0.9em; margin: 0.4em 0; }
th, td { border: 1px solid #ccc; padding: 3px 6px; text-align: left; } th { background: #f0f0f0; }
table.buy td { white-space: nowrap; } table.buy td:last-child { white-space: normal; }
figure { margin: 0.8em 0; } img { max-width: 100%; height: auto; }
.caution { background: #fff6e0; border-left: 4px solid #e0a000; padding: 6px 10px; margin: 6px 0; }
@media print { figure { page-break-inside: avoid; } body { max-width: none; } }
"""

PAGE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<meta name="viewport" content="width=device-width, initial-scale=1">
<style>{style}</style></head><body>
{body}
</body></html>
"""


def figures(items: list[ReportItem]) -> dict[str, bytes]:
    """The report's figures as PNG bytes, by name, in the page's order."""
    from xo_fit.output.plots import png_bytes
    from xo_fit.output.report.figures import (delay_figure, impedance_figure, phase_figure, prune_figure,
                                              sum_figure, ways_figure)
    from xo_fit.output.report.offaxis import angles_figure, directivity_figure

    makers = [("sum", sum_figure), ("ways", ways_figure), ("phase", phase_figure), ("delay", delay_figure),
              ("impedance", impedance_figure), ("directivity", directivity_figure), ("angles", angles_figure),
              ("prune", prune_figure)]
    out = {}
    for name, make in makers:
        figure = make(items)
        if figure is not None:
            out[name] = png_bytes(figure)
    return out


def header(rep: Report) -> Markup:
    """The page's title, the results it shows and what made it."""
    return join(tag("h1", f"{_names(rep)}: crossover report"),
                para(f"Results: {', '.join(it.label for it in rep.items)}. Made by xo_fit from simulations of the "
                     "measured drivers in the network; check the built speaker by measurement."),
                tag("p", rep.made, attrs='class="made"'))


def _names(rep: Report) -> str:
    return ", ".join(dict.fromkeys(it.job.name for it in rep.items))


def _made(command: list[str] | None) -> str:
    from datetime import datetime

    from xo_fit import __version__

    return (f"xo_fit {__version__}, {datetime.now(UTC).strftime('%Y-%m-%d %H:%M UTC')}, from: "
            f"{' '.join(command) if command else 'the Python API'}")


def write_report(items: list, out: Path, command: list[str] | None = None, *, buy=None,
                 speakers: int | None = None) -> Path:
    """report.html (self-contained: images inline), its PNGs and bom.csv for designs and spreads, overlaid.

    Parameters
    ----------
    items : list of Design or Spread
        The results, overlaid in the order given (one grid and one set of drivers).
    out : Path
        The folder to write into (made where missing).
    command : list of str, optional
        The command line that made the report, shown with the version and date.
    buy : Design or Spread, optional
        The result whose parts are listed to buy (added to ``items`` where it is not one of them); default: the
        last snap among ``items``, else the last result whose parts all come from a series or drawer, else none.
    speakers : int, optional
        Speakers the quantities of bom.csv are for (default 2, a stereo pair).

    Returns
    -------
    Path
        The report.html written. bom.csv is written beside it for the result bought from; with none, an older
        bom.csv in ``out`` is removed (it would list another report's parts).
    """
    from xo_fit.output.bom import BOM_COLUMNS, DEFAULT_SPEAKERS, bom_rows
    from xo_fit.output.schematic import draw

    if not items:
        raise XoFitError("nothing to report: give at least one design")
    given = list(items)
    if buy is not None and not any(x is buy or getattr(x, "design", None) is buy for x in given):
        given.append(buy)
    rep = Report(items=report_items(given), speakers=speakers or DEFAULT_SPEAKERS, made=_made(command))
    check_alike(rep.items)
    rep.buy, rep.buy_reason = choose_buy(rep.items, buy)
    if rep.buy is not None:
        rep.bom = bom_rows(rep.buy.design, rep.speakers)
    rep.stress = rep.build.design.stress_report  # None without [stress] power
    rep.figures = figures(rep.items)
    rep.drawing = draw(rep.build.job, rep.build.design.values)
    from xo_fit.io.results import make_folder

    out = make_folder(out)  # a file, device or pipe in the way is refused in one line, never replaced
    _write_files(rep, out, BOM_COLUMNS)
    body = join(header(rep), *(make(rep) for make in SECTIONS))
    page = PAGE.format(title=esc(f"{_names(rep)}: crossover report"), style=STYLE, body=body)
    from xo_fit.io.results import write_text

    write_text(out / "report.html", page)
    return out / "report.html"


def _write_files(rep: Report, out: Path, columns: list[str]) -> None:
    """The PNGs (each figure and the network drawing) and bom.csv (or an old one removed)."""
    from xo_fit.io.results import write_rows

    pngs = dict(rep.figures)
    if rep.drawing is not None:
        pngs["network"] = rep.drawing
    for name, data in pngs.items():
        with atomic_path(out / f"{name}.png", suffix=".png") as tmp:
            tmp.write_bytes(data)
    if rep.bom is not None:
        write_rows(out / "bom.csv", rep.bom, columns)
    elif (out / "bom.csv").is_file():
        (out / "bom.csv").unlink()
