"""A design without one of its parts: the part opened (deleted) or shorted (its two nodes merged).

:func:`variant` builds the job and system without a part, or None when the
removal is no legal netlist (it leaves a driver unconnected, shorts the source
or a driver, or strands a node); :func:`idle_parts` scores every removal of a
design without refitting and names the parts whose removal changes the cost by
less than 1 % of it (the ``negligible`` finding).
"""

from __future__ import annotations

import json
import math
from typing import TYPE_CHECKING

import numpy as np

from xo_fit.config import COST_FLOOR, NEGLIGIBLE
from xo_fit.constants import GROUND_NODE, SOURCE_NODE
from xo_fit.errors import XoFitError

if TYPE_CHECKING:
    from xo_fit.model.system import System

#: The two ways a part can leave a netlist.
HOWS = ("open", "short")
#: The negligible-part check scores 2 P variants, each rebuilt and solved densely (P parts, N nodes, F points:
#: about P (P + N^3 F) work); above these sizes it is skipped and a finding says so (measured: 64 parts in a chain
#: of 64 nodes at 320 points take about 3 s; a 400-node chain would take minutes).
IDLE_MAX_PARTS = 64
IDLE_MAX_NODES = 64
#: A driver whose terminal voltage stays below this share of the source's at every frequency is unconnected.
DEAD_DRIVER = 1e-9


class JobDocument:
    """A job's document read once for its many removals.

    A removal's JSON text is the document's text around its part list with the removal's own part list put in:
    the same text as ``json.dumps`` of the whole, without dumping the rest again.

    Parameters
    ----------
    job : Job
        The job (:class:`~xo_fit.job.model.Job`) whose parsed document (``job.data``) the removals edit.

    Attributes
    ----------
    job : Job
        The job.
    data : dict
        The parsed document, never changed (each removal copies the part tables it edits).
    specs : dict
        The job's part specs by name (:class:`~xo_fit.job.model.PartSpec`).
    around : tuple of str or None
        The document's JSON text before and after its part list; None where the split fails (no ``part`` list).
    """

    #: Stands for the part list in the JSON text split around it.
    MARK = "\x00xo_fit parts\x00"

    def __init__(self, job) -> None:
        self.job = job
        self.data = job.data
        self.specs = {p.name: p for p in job.parts}
        text = json.dumps({**self.data, "part": self.MARK}, default=str)
        pieces = text.split(json.dumps(self.MARK))
        self.around = (pieces[0], pieces[1]) if len(pieces) == 2 and "part" in self.data else None

    def fresh(self) -> dict:
        """A document to edit: the parsed one with copies of its part tables.

        Returns
        -------
        dict
            The document, its ``part`` list a new list of copied tables (the other tables shared, unchanged).
        """
        return {**self.data, "part": [dict(p) for p in self.data.get("part", [])]}

    def text(self, doc: dict) -> str:
        """``json.dumps(doc, default=str)`` of a document :meth:`fresh` gave, its part list edited.

        Parameters
        ----------
        doc : dict
            A document from :meth:`fresh`, only its ``part`` list changed.

        Returns
        -------
        str
            The document's JSON text.
        """
        if self.around is None:
            return json.dumps(doc, default=str)
        return self.around[0] + json.dumps(doc["part"], default=str) + self.around[1]


def removal_document(job, name: str | None, how: str, values: dict[str, float],
                     source: JobDocument | None = None) -> dict | None:
    """The job's document without one part (opened or shorted), the other parts' values set.

    Opening deletes the part; shorting also merges its two nodes (into the source's or ground's where it touches
    one).

    Parameters
    ----------
    job : Job
        The job (:class:`~xo_fit.job.model.Job`).
    name : str or None
        The part to remove; None (or a name not in the job): no part removed, only the values set.
    how : str
        ``"open"`` or ``"short"``.
    values : dict
        Part name -> value, SI (in ohm, H or F), set on the R, L and C parts named (a free part's clamped into its
        range); the parts not named keep the document's values.
    source : JobDocument, optional
        The job's :class:`JobDocument`, where many removals of one job are made; made here when not given.

    Returns
    -------
    dict or None
        The edited document; None when the short would join the source's two terminals or leave some part
        across a single node.
    """
    source = source if source is not None else JobDocument(job)
    doc = source.fresh()
    parts = doc["part"]
    gone = next((p for p in parts if p.get("name") == name), None) if name is not None else None
    rest = [p for p in parts if p is not gone]
    if gone is not None and how == "short":
        a, b = (str(n).strip() for n in gone["nodes"])
        special = {SOURCE_NODE, GROUND_NODE}
        if a in special and b in special:
            return None  # shorts the source
        keep, drop = (b, a) if a not in special else (a, b)
        for p in rest:
            p["nodes"] = [keep if str(n).strip() == drop else n for n in p["nodes"]]
        if any(str(p["nodes"][0]).strip() == str(p["nodes"][1]).strip() for p in rest):
            return None  # a driver (or another part) would sit across one node
    for p in rest:
        if p.get("name") in values and p.get("type") != "driver":
            spec = source.specs[p["name"]]
            v = float(values[p["name"]])
            if spec.free:
                v = min(max(v, spec.min), spec.max)
            p["value"] = v
    doc["part"] = rest
    return doc


def reduced_job(job, name: str | None, how: str, values: dict[str, float], source: JobDocument | None = None):
    """The job without one part, built from ``job``'s own parts without reading the document again.

    The result is the job :func:`xo_fit.job.reader.load_job` would read from :func:`removal_document`'s document
    (the part specs, the document and the other tables the same). The derived job has no path, part lines or
    warnings (those of the job file were given when it was read). A part value that would not pass the reader (a
    fixed value outside what the arithmetic takes) sends the document through
    :func:`~xo_fit.job.reader.load_job` instead, which raises its JobError.

    Parameters
    ----------
    job : Job
        The job (:class:`~xo_fit.job.model.Job`).
    name : str or None
        The part to remove; None: no part removed, only the values set.
    how : str
        ``"open"`` or ``"short"``.
    values : dict
        Part name -> value, SI (in ohm, H or F), as in :func:`removal_document`.
    source : JobDocument, optional
        The job's :class:`JobDocument`, where many removals of one job are made; made here when not given.

    Returns
    -------
    Job or None
        The reduced job; None when the short is no legal netlist.

    Raises
    ------
    XoFitError
        Only where a part value would not pass the reader (the reader's JobError).
    """
    from dataclasses import replace

    from xo_fit.job.model import FrozenMap
    from xo_fit.job.parts import SOLVABLE  # the reader's bounds on a part value

    source = source if source is not None else JobDocument(job)
    doc = removal_document(job, name, how, values, source)
    if doc is None:
        return None
    parts = []
    for p in doc["part"]:
        spec = source.specs[p["name"]]
        nodes = (str(p["nodes"][0]).strip(), str(p["nodes"][1]).strip())
        value = float(p["value"]) if spec.type != "driver" and spec.name in values else spec.value
        if value is not None and not (SOLVABLE[0] <= value <= SOLVABLE[1]
                                      and (spec.min is None or spec.min <= value <= spec.max)):
            from xo_fit.job.reader import load_job

            return load_job(doc, base=job.folder, copy=False)  # raises what the reader says of the value
        parts.append(spec if (nodes, value) == (spec.nodes, spec.value) else _moved(spec, nodes, value))
    return replace(job, parts=tuple(parts), path=None, document=source.text(doc), part_lines=FrozenMap(),
                   warnings=(), swept=FrozenMap())


def _moved(spec, nodes: tuple[str, str], value: float | None):
    """``dataclasses.replace(spec, nodes=nodes, value=value)`` of a frozen PartSpec, without its __init__ (a prune
    makes thousands; the fields are the reader's, checked, and these two are the caller's, checked)."""
    new = object.__new__(type(spec))
    new.__dict__.update(spec.__dict__)
    new.__dict__["nodes"], new.__dict__["value"] = nodes, value
    return new


def variant(system: System, name: str, how: str, values: dict[str, float] | None = None, *,
            check_dead: bool = True, source: JobDocument | None = None) -> System | None:
    """The system without one part (opened or shorted), or None when that is no legal netlist.

    No legal netlist: a node left hanging, the source or a driver shorted, or (with ``check_dead``) a driver
    that no longer sees any voltage (:func:`dead_at`). The driver data, grid and off-axis data are ``system``'s
    (:func:`~xo_fit.model.system.derive_system`); the job is :func:`reduced_job`'s.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    name : str
        The part to remove.
    how : str
        ``"open"`` or ``"short"``.
    values : dict, optional
        Part name -> value, SI (in ohm, H or F), of the design the removal starts from; default the job's values.
    check_dead : bool
        Refuse a removal that leaves a driver without voltage; False leaves that to the caller
        (:func:`dead_driver` on a solve it makes anyway).
    source : JobDocument, optional
        The system's job's :class:`JobDocument`, where many removals of one job are made.

    Returns
    -------
    System or None
        The reduced system, or None.
    """
    from xo_fit.model.system import derive_system

    values = values if values is not None else dict(zip(system.part_names, system.values()))
    try:
        job = reduced_job(system.job, name, how, values, source)
        if job is None:
            return None
        s = derive_system(system, job)
    except XoFitError:
        return None
    if check_dead and dead_at(s, np.array([values[n] for n in s.part_names])):
        return None
    return s


#: Grid points the dead-driver check solves first (spread over the grid): a driver that sees the threshold at one
#: of them is alive, exactly as on the whole grid; only where some driver stays below at all of them is the whole
#: grid solved.
DEAD_PROBES = 8


def dead_at(system, values: np.ndarray) -> bool:
    """:func:`dead_driver` of one design, with the same answer for less work.

    A driver cut off from the source (:func:`cut_off`) sees exactly no voltage; else the dense solve at
    :data:`DEAD_PROBES` points of the grid settles it where every driver reaches the threshold at one of them (as
    the whole grid then would), and the whole grid is solved only where some driver does not.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    values : ndarray
        The design's part values, SI (ohm, H, F), shape (P,).

    Returns
    -------
    bool
        Whether some driver's voltage stays below DEAD_DRIVER times the source's at every frequency.
    """
    from xo_fit.solver.dense import solve_dense

    if cut_off(system.network):
        return True
    v = np.asarray(values, dtype=float)
    nf = system.frequencies.size
    # distinct and sorted, as np.unique gives them (which imports numpy.ma, ~0.1 s in a fresh worker without
    # compiled bytecode)
    probes = np.array(sorted({int(k) for k in np.linspace(0, nf - 1, min(DEAD_PROBES, nf)).round()}), dtype=int)
    sol = solve_dense(system.network, np.repeat(v[None], probes.size, axis=0), probes)  # voltages (M, D)
    if np.all(np.max(np.abs(sol.voltages), axis=0) >= DEAD_DRIVER * abs(system.job.source_voltage)):
        return False
    return dead_driver(system, system.network.solve_reference(v).voltages)


def cut_off(network) -> bool:
    """Whether some driver hangs from ground alone, whatever the values.

    No path of parts (drivers included) leads from the source's node to either of its terminals without passing
    through ground, so no current reaches it and both its terminals stay at exactly 0 V at every frequency.

    Parameters
    ----------
    network : Network
        The compiled network (:class:`~xo_fit.solver.network.Network`; its ``branches``).

    Returns
    -------
    bool
        Whether some driver is cut off from the source.
    """
    links: dict[str, list[str]] = {}
    for br in network.branches:
        if GROUND_NODE not in (br.a, br.b):
            links.setdefault(br.a, []).append(br.b)
            links.setdefault(br.b, []).append(br.a)
    reached, todo = {SOURCE_NODE}, [SOURCE_NODE]
    while todo:
        for n in links.get(todo.pop(), ()):
            if n not in reached:
                reached.add(n)
                todo.append(n)
    return any(br.kind == "D" and br.a not in reached and br.b not in reached for br in network.branches)


def dead_driver(system, voltages: np.ndarray) -> bool:
    """Whether some driver sees (almost) no voltage anywhere on the grid.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`; its source voltage).
    voltages : ndarray
        The driver terminal voltages of a batch, complex, in V, shape (B, D, F); only the first design is judged.

    Returns
    -------
    bool
        Whether some driver's |voltage| stays below DEAD_DRIVER times the source's at every frequency.
    """
    return bool(np.any(np.max(np.abs(voltages[0]), axis=-1) < DEAD_DRIVER * abs(system.job.source_voltage)))


def removals(system: System, values: dict[str, float], *, protect: bool = True,
             check_dead: bool = True) -> list[tuple[str, str, System]]:
    """Every legal removal of an R, L or C part, opened and shorted.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    values : dict
        Part name -> value, SI (in ohm, H or F), of the design the removals start from.
    protect : bool
        Skip the parts with ``keep = true``.
    check_dead : bool
        As in :func:`variant`.

    Returns
    -------
    list of tuple
        (part name, ``"open"`` or ``"short"``, the system without it), in the job's part order.
    """
    out = []
    source = JobDocument(system.job)
    for p in system.job.valued_parts:
        if protect and p.keep:
            continue
        for how in HOWS:
            s = variant(system, p.name, how, values, check_dead=check_dead, source=source)
            if s is not None:
                out.append((p.name, how, s))
    return out


def relative_change(cost: float, base: float) -> float:
    """(cost - base) / max(base, COST_FLOOR): the change as a share of the design's cost.

    Below COST_FLOOR the share is of COST_FLOOR, a cost that stands for "on target".

    Parameters
    ----------
    cost : float
        The changed design's cost (dimensionless, as the job's cost).
    base : float
        The design's own cost (dimensionless).

    Returns
    -------
    float
        The relative change (dimensionless; 0.01 is +1 %).
    """
    return (cost - base) / max(base, COST_FLOOR)


def idle_parts(system, values: np.ndarray, cost: float | None) -> list[dict]:
    """``negligible`` findings: parts whose removal (open or short, no refit) changes the cost by less than 1 %.

    Every part is tried (``keep = true`` too); a removal that breaks a [limits] limit the design meets, or leaves
    a driver without voltage, does not count. Above IDLE_MAX_PARTS parts or IDLE_MAX_NODES nodes the check is
    skipped and one finding (``part`` None) says so.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    values : ndarray
        The design's part values, SI (ohm, H, F), in the system's part order, shape (P,).
    cost : float or None
        The design's own cost (dimensionless); None (no targets) or not finite: nothing to say.

    Returns
    -------
    list of dict
        Findings ``{"kind": "negligible", "part", "text"}``, one per part whose smaller change (open or short) is
        under NEGLIGIBLE of the cost.
    """
    from xo_fit.model.cost import CostModel
    from xo_fit.search.fitting import cost_model
    from xo_fit.units import format_value

    if cost is None or not math.isfinite(cost):
        return []
    n_parts, n_nodes = len(system.part_names), len(system.network.unknown_nodes)
    if n_parts > IDLE_MAX_PARTS or n_nodes > IDLE_MAX_NODES:
        return [{"kind": "negligible", "part": None,
                 "text": f"not checked which parts do little: the network has {n_parts} parts and {n_nodes} nodes "
                         f"(the check, one dense solve per removal, runs up to {IDLE_MAX_PARTS} parts and "
                         f"{IDLE_MAX_NODES} nodes)"}]
    model = cost_model(system)
    if model is None:
        return []
    targets = model[1]  # the same grid and targets for every variant
    by_name = dict(zip(system.part_names, np.asarray(values, dtype=float)))
    allowed = 0.0  # [limits]: a removal that breaks one the design meets is not negligible
    if model[0].limits is not None:
        v = np.asarray(values, dtype=float)[None]
        violations = model[0].evaluate_simulation(system.simulate(v, dense=True), v).violations
        assert violations is not None, "a cost model with limits reports their violations"
        allowed = float(violations["total"][0])
    best: dict[str, tuple[float, str]] = {}
    for name, how, s in removals(system, by_name, protect=False, check_dead=False):
        vals = np.array([by_name[n] for n in s.part_names])[None]
        sim = s.simulate(vals, dense=True)  # one dense solve serves the check and the cost
        if dead_driver(s, sim.voltages):
            continue
        ev = CostModel(s, targets).evaluate_simulation(sim, vals)
        other = float(ev.cost[0])
        if not math.isfinite(other) or (ev.violations is not None and ev.violations["total"][0] > allowed + 1e-12):
            continue
        change = relative_change(other, cost)
        if abs(change) < NEGLIGIBLE and (name not in best or abs(change) < abs(best[name][0])):
            best[name] = (change, how)
    out = []
    for name, (change, how) in best.items():
        p = system.job.part(name)
        verb = "removing" if how == "open" else "shorting"
        out.append({"kind": "negligible", "part": name,
                    "text": f"{name} ({format_value(by_name[name], p.unit)}) does little: {verb} "
                            f"it changes the cost by {change * 100:+.2f} % (no refit); consider leaving it out"})
    return out
