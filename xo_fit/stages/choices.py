"""What can be bought for one part's value: series values, drawer values and two-part combinations.

Every snapped part gets a short list of choices: its log-nearest purchasable
value and the ``NEIGHBOURS`` nearest on each side (series values from
:mod:`xo_fit.series`, or values in the drawer), plus, with ``combine = 2``,
the best two-part combinations near its value (two capacitors in parallel;
two resistors in series or in parallel; two coils in series). The snap
(:mod:`xo_fit.stages.snapping`) searches the choices of every part together
(:mod:`xo_fit.stages.choice_search`).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from xo_fit.config import NEIGHBOURS, PAIRS_PER_PART
from xo_fit.errors import XoFitError
from xo_fit.io.inventory import Inventory
from xo_fit.series import neighbours
from xo_fit.units import format_value


@dataclass(frozen=True)
class Choice:
    """A purchasable way to make one part's value.

    Attributes
    ----------
    value : float
        The resulting value, SI (in ohm, H or F).
    source : str
        The series name, or ``"inventory"``.
    pieces : tuple of float
        The values of the parts that make it (one, or two), SI (in ohm, H or F).
    connection : str
        ``"single"``, ``"parallel"`` or ``"series"``.
    uses : tuple
        (kind, value) of each drawer part used; empty for a series value.
    """

    value: float
    source: str
    pieces: tuple[float, ...]
    connection: str = "single"
    uses: tuple = ()

    def describe(self, unit: str) -> str:
        """The choice as the console and parts.csv write it (:func:`combination_text`).

        Parameters
        ----------
        unit : str
            The unit the values are written in (``xo_fit.constants.PART_UNIT`` of the part's kind).

        Returns
        -------
        str
            E.g. "4.7 µF || 1 µF".
        """
        return combination_text(self.connection, [format_value(p, unit) for p in self.pieces])


def combination_text(connection: str, texts: list[str]) -> str:
    """One notation for a part made of two, in the console, parts.csv and the report.

    Parameters
    ----------
    connection : str
        ``"single"``, ``"parallel"`` or ``"series"``.
    texts : list of str
        Each piece's value as text.

    Returns
    -------
    str
        The single text, "4.7 µF || 1 µF" in parallel or "2.2 Ω + 1 Ω" in series.
    """
    if connection == "single":
        return texts[0]
    return (" || " if connection == "parallel" else " + ").join(texts)


def _combine(kind: str, a: float, b: float) -> list[tuple[float, str]]:
    if kind == "C":
        return [(a + b, "parallel")]
    if kind == "L":
        return [(a + b, "series")]
    return [(a + b, "series"), (a * b / (a + b), "parallel")]


def _pool(kind: str, target: float, source: str, inventory: Inventory | None) -> list[float]:
    """Candidate single values near ``target``: series values or drawer values, within a factor 4."""
    if source == "inventory":
        assert inventory is not None, "a part takes its values from the drawer only when there is one"
        return [v for v, _ in inventory.values(kind) if target / 4 <= v <= target * 4]
    return neighbours(target, source, 6)


def choices_for(kind: str, target: float, source: str, *, inventory: Inventory | None = None, combine: int = 1,
                lo: float | None = None, hi: float | None = None, k: int = NEIGHBOURS,
                top_up: str | None = None) -> list[Choice]:
    """The choices of one part: the nearest purchasable values and, with ``combine`` = 2, the best pairs.

    Parameters
    ----------
    kind : str
        ``"R"``, ``"L"`` or ``"C"``.
    target : float
        The continuous value, SI (in ohm, H or F).
    source : str
        A series name (:mod:`xo_fit.series`), or ``"inventory"``: the drawer's values.
    inventory : Inventory, optional
        The drawer (:class:`~xo_fit.io.inventory.Inventory`); needed where ``source`` is ``"inventory"``.
    combine : int
        1: single parts; 2: also up to PAIRS_PER_PART two-part combinations nearer ``target`` than every single
        (dimensionless).
    lo, hi : float, optional
        The part's allowed range, SI (in ohm, H or F): series values keep to it where they can, pairs always.
    k : int
        Single values on each side of the log-nearest one (dimensionless).
    top_up : str, optional
        With a drawer, a series whose nearest values are offered too, to be bought where the drawer lacks
        them (they count against no stock).

    Returns
    -------
    list of Choice
        The singles in ascending value, then the top-up values, then the pairs, nearest first.

    Raises
    ------
    XoFitError
        Where the drawer holds no part of ``kind``.
    """
    out: list[Choice] = []
    if source == "inventory":
        assert inventory is not None, "a part takes its values from the drawer only when there is one"
        avail = sorted(v for v, _ in inventory.values(kind))
        if not avail:
            raise XoFitError(f"the inventory has no parts of kind {kind}", path=inventory.path)
        i = int(np.argmin(np.abs(np.log(np.array(avail) / target))))
        singles = avail[max(0, i - k): i + k + 1]
        out += [Choice(v, "inventory", (v,), uses=((kind, v),)) for v in singles]
        if top_up is not None:
            have = set(singles)
            out += [Choice(v, top_up, (v,)) for v in neighbours(target, top_up, k, lo, hi) if v not in have]
    else:
        singles = neighbours(target, source, k, lo, hi)
        out += [Choice(v, source, (v,)) for v in singles]
    if combine >= 2:
        pool = sorted(set(_pool(kind, target, source, inventory)))
        pairs = []
        for a, b in itertools.combinations_with_replacement(pool, 2):
            for value, how in _combine(kind, a, b):
                if lo is not None and hi is not None and not lo * (1 - 1e-9) <= value <= hi * (1 + 1e-9):
                    continue
                uses = ((kind, a), (kind, b)) if source == "inventory" else ()
                pairs.append((abs(np.log(value / target)), Choice(value, source, (b, a), how, uses)))
        pairs.sort(key=lambda t: t[0])
        best_single = min(abs(np.log(c.value / target)) for c in out)
        out += [c for d, c in pairs[:PAIRS_PER_PART] if d < best_single]
    return out


def log_nearest_index(choices: list[Choice], target: float) -> int:
    """Index of the single-part choice nearest to ``target`` in log distance (the rounding baseline).

    Parameters
    ----------
    choices : list of Choice
        A part's choices (:func:`choices_for`).
    target : float
        The continuous value, SI (in ohm, H or F).

    Returns
    -------
    int
        The index into ``choices`` (dimensionless); of two equally near, the larger value.
    """
    singles = [i for i, c in enumerate(choices) if c.connection == "single"]
    return min(singles, key=lambda i: (abs(np.log(choices[i].value / target)), -choices[i].value))
