"""Which rated parts a fused kernel judges: all of them in a fit's; in a prune's family's, those not removed.

A prune refits each trial removal on the starting design's kernel, a removed part standing in as an extreme value
(:data:`xo_fit.stages.pruning.STAND_IN`). The reduced netlist's cost judges only the parts it has: its stress term
is the mean over its own rated parts and its ratings limit the worst of those. So the family's kernel
(:attr:`xo_fit.model.fused.FusedCost.stand_ins` set) tests each judged rated part's value against the stand-ins,
per candidate: one at a stand-in is left out of the stress term's sum and count and of the ratings limit's
maximum (0 where none is left, as a netlist without rated parts has). A fit's kernel has no such test: its text,
hence its arithmetic, is that of a kernel before the switches.
"""

from __future__ import annotations

import copy

from xo_fit.solver.ir import Var, f8, let, select, total


def switches(judged: list, stand_ins: dict | None, src: list) -> tuple[dict, Var]:
    """Per judged rated part a flag of whether the kernel judges it, for a kernel with stand-ins.

    Parameters
    ----------
    judged : list of tuple
        The rated parts the kernel reduces (branch index, values column, kind "R"/"L"/"C", rating in W, V or A),
        m their position here; the value of part m is the kernel's name ``x_{branch}``.
    stand_ins : dict or None
        ``{"open" | "short": {"R" | "L" | "C": value}}``, SI (ohm, H, F): a part exactly at one is removed; None:
        every part is judged (a fit's kernel).
    src : list of Stmt
        The candidate's statements; the flags' are appended (none without stand-ins or rated parts).

    Returns
    -------
    tuple
        ({m: the F8 name ``on{m}``, 1.0 judged, 0.0 removed}, the F8 name ``n_on``, their sum, a count); without
        stand-ins or rated parts the dict is empty and ``n_on`` undeclared (not to be read).
    """
    n_on = f8("n_on")
    if not stand_ins or not judged:
        return {}, n_on
    opened, shorted = stand_ins["open"], stand_ins["short"]
    on = {}
    for m, (j, _, kind, _) in enumerate(judged):
        x = f8(f"x_{j}")
        on[m] = f8(f"on{m}")
        src.append(let(on[m], select(x.eq(opened[kind]), 0.0, select(x.eq(shorted[kind]), 0.0, 1.0))))
    src.append(let(n_on, total(list(on.values()))))
    return on, n_on


def judging(cm, kept: list):
    """The cost model ``cm`` (a :class:`xo_fit.model.cost.CostModel`) judging only the rated parts ``kept``.

    Parameters
    ----------
    cm : CostModel
        A job's reference cost.
    kept : list of tuple
        The rated parts to judge, of :func:`xo_fit.model.cost.rated_parts`' tuples (the others are removed).

    Returns
    -------
    CostModel
        A shallow copy of ``cm`` (and of its limits) whose stress term and ratings limit judge ``kept`` alone, as
        the reduced netlist's cost model does: the same numbers where the netlist is the reduced one's.
    """
    out = copy.copy(cm)
    out.rated = [r for r in cm.rated if r in kept]
    if cm.limits is not None:
        out.limits = copy.copy(cm.limits)
        out.limits.cm = out
        out.limits.rated = [r for r in cm.limits.rated if r in kept]
    return out
