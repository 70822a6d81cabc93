"""The results a report overlays: their labels, the one to buy from, their targets and reference lines.

Each result keeps its own name: where the results come from jobs of several names (a batch's variants), a
label is the job's name and the stage ("wren-fc1800: fit"); otherwise the stage alone ("fit", "snap"),
numbered where two are alike ("fit 1", "fit 2").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from xo_fit.errors import XoFitError

#: IEC 60268-5: a loudspeaker's |Z| should not fall below 80 % of its rated impedance.
RATED_SHARE = 0.8


@dataclass(eq=False)
class ReportItem:
    """One overlaid result: ``design`` (:class:`~xo_fit.output.design.Design`), ``spread`` (the
    :class:`~xo_fit.output.design.Spread` it came as, or None) and its ``label`` in the page."""

    label: str
    design: Any
    spread: Any = None
    given: Any = None  # the object handed to the report (a Design or a Spread)

    @property
    def columns(self) -> dict | None:
        """The spread.csv columns of a spread, else None."""
        return None if self.spread is None else self.spread.columns

    @property
    def job(self):
        """The job of the item's design."""
        return self.design.system.job


def report_items(items: list) -> list[ReportItem]:
    """Designs and spreads as :class:`ReportItem`, each labelled by its job's name (where the names differ) and
    its stage; labels alike are numbered."""
    designs = [getattr(x, "design", x) for x in items]
    several = len({d.system.job.name for d in designs}) > 1
    out = []
    for x, d in zip(items, designs):
        base = d.label or d.stage
        label = f"{d.system.job.name}: {base}" if several else str(base)
        out.append(ReportItem(label=label, design=d, spread=x if d is not x else None, given=x))
    labels = [it.label for it in out]
    for k, it in enumerate(out):
        if labels.count(it.label) > 1:
            it.label = f"{it.label} {labels[:k + 1].count(it.label)}"
    return out


def check_alike(items: list[ReportItem]) -> None:
    """Raise XoFitError unless every result shares the first one's grid and drivers."""
    base = items[0].design.system
    f = base.frequencies
    names = [d.name for d in base.job.drivers]
    for it in items[1:]:
        g = it.design.system.frequencies
        if g.shape != f.shape or not np.allclose(g, f) or [x.name for x in it.job.drivers] != names:
            raise XoFitError(f"designs overlaid in one report need the same grid and drivers; '{it.label}' differs "
                             f"from '{items[0].label}' (report them separately)")


def purchasable(design) -> bool:
    """True where every free part of ``design`` has a series or drawer source (a snap, or a spread of one)."""
    free = [p for p in design.job.valued_parts if p.free]
    sources = [design.part_info.get(p.name, {}).get("source") for p in free]
    return bool(free) and all(s not in (None, "", "continuous") for s in sources)


def choose_buy(items: list[ReportItem], buy=None) -> tuple[ReportItem | None, str]:
    """The result whose parts the report lists to buy, and why it was chosen.

    ``buy`` is one of the given objects (a Design or Spread), or None: then the last snap given, else the last
    result whose parts all come from a series or drawer (a spread of a snap), else none (the values are
    continuous and never listed to buy silently)."""
    if buy is not None:
        for it in reversed(items):
            if it.given is buy or it.design is buy:
                return it, "named with --buy"
        raise XoFitError("the result to buy from is not among the results reported")
    snaps = [it for it in items if it.design.stage == "snap"]
    if snaps:
        return snaps[-1], "the last snap given"
    bought = [it for it in items if purchasable(it.design)]
    if bought:
        return bought[-1], "the last result whose parts all come from a series or a drawer"
    return None, ""


def target_groups(items: list[ReportItem]) -> list[list[ReportItem]]:
    """The results grouped by their jobs' targets (the way targets, band, level, curve and the impedance floor),
    in the order they were given: one group where every result shares its targets."""
    groups: list[list[ReportItem]] = []
    for it in items:
        key = (it.job.target, it.job.cost.impedance_min)
        for g in groups:
            if (g[0].job.target, g[0].job.cost.impedance_min) == key:
                g.append(it)
                break
        else:
            groups.append([it])
    return groups


def reference_lines(jobs) -> list[tuple[float, str]]:
    """The impedance plot's reference lines, (ohm, label) each: every job's floor ([cost] impedance_min) and 80 %
    of its rated impedance ([stress] rated_impedance). Lines at one value are one line whose label says what it
    is, once ("floor 3.2 Ω = 80 % of the rated 4 Ω")."""
    lines: list[tuple[float, list[str]]] = []

    def add(value: float, label: str) -> None:
        for v, labels in lines:
            if math.isclose(v, value, rel_tol=1e-6):
                if label not in labels:
                    labels.append(label)
                return
        lines.append((value, [label]))

    for job in jobs:
        if job.cost.impedance_min > 0:
            add(job.cost.impedance_min, f"floor {job.cost.impedance_min:g} Ω")
    for job in jobs:
        rated = job.stress.rated_impedance
        if rated:
            add(RATED_SHARE * rated, f"80 % of the rated {rated:g} Ω")
    return [(v, " = ".join(labels)) for v, labels in lines]
