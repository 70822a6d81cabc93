"""The crossover netlist as the solver sees it: branches, topology checks, series chains.

A network is a set of two-terminal parts between named nodes. Node ``"in"`` is
the source's positive terminal and ``"0"`` its return. Each part is a series
branch: R (Z = R), L (Z = r + j w L, r its DC resistance), C
(Z = esr + 1/(j w C)) or a driver (its complex impedance on the grid).
Nothing here knows of jobs or files.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from dataclasses import dataclass

import numpy as np

from xo_fit.constants import GROUND_NODE, SOURCE_NODE
from xo_fit.errors import NetworkError

if TYPE_CHECKING:
    from xo_fit.solver.network import Network


@dataclass(frozen=True)
class Branch:
    """One part as the solver sees it.

    Parameters
    ----------
    name : str
        The part's name (unique in the netlist).
    kind : str
        "R", "L", "C" or "D" (a driver).
    a, b : str
        Its nodes; its current flows a -> b for a positive voltage V(a) - V(b).
    r_coef : float
        Coefficient of its series resistance r = r_coef * value**r_exp, in ohm per (value's unit)**r_exp: an
        L's DC resistance, a C's ESR; 0 for none (and for an R or a driver).
    r_exp : float
        The exponent of that law, dimensionless: 0 for a fixed resistance in ohm, 0.6 for the wire law of
        :mod:`xo_fit.physics.coils`.
    driver : int
        Its index (dimensionless) along the driver axis D for kind "D"; -1 otherwise.
    """

    name: str
    kind: str
    a: str
    b: str
    r_coef: float = 0.0
    r_exp: float = 0.0
    driver: int = -1

    @property
    def lossy(self) -> bool:
        """Whether it is an L or a C with a series resistance of its own (DCR, ESR)."""
        return self.kind in ("L", "C") and self.r_coef != 0.0


@dataclass
class Solution:
    """Result of a batched solve (:meth:`xo_fit.solver.network.Network.solve`).

    Parameters
    ----------
    voltages : ndarray
        Each driver's terminal voltage V(a) - V(b), complex, in V, shape (B, D, F), for the source at its
        voltage behind its resistance.
    impedance : ndarray
        The input impedance at "in" against "0" (the source resistance not included), complex, in ohm, shape
        (B, F).

    Notes
    -----
    :func:`xo_fit.solver.dense.solve_dense` returns one for M (candidate, frequency) points: shapes (M, D) and
    (M,).
    """

    voltages: np.ndarray
    impedance: np.ndarray


def check_topology(parts: list[tuple[str, str, str]], *, context: str | None = None) -> None:
    """Check a netlist given as (name, node a, node b) triples.

    Parameters
    ----------
    parts : list of tuple of str
        Every part as (name, node a, node b).
    context : str or None
        Where the netlist comes from (the job file), for the messages.

    Raises
    ------
    NetworkError
        With ``key`` naming the part where there is one: a duplicate name, a part shorted onto one node, no
        part at "in" or "0", a node that only one part touches (a dangling end, usually a misspelt node), "in"
        with no path to "0", and parts in an island not connected to the source.
    """
    where = context
    names: set[str] = set()
    for name, a, b in parts:
        if name in names:
            raise NetworkError(f"duplicate part name '{name}'", path=where, key=f"part {name}")
        names.add(name)
        if a == b:
            raise NetworkError(f"both ends on node '{a}': the part is shorted onto one node",
                               path=where, key=f"part {name}")
    nodes_all = sorted({n for _, a, b in parts for n in (a, b)})
    if SOURCE_NODE not in nodes_all:
        raise NetworkError(f"no part connects to the source node '{SOURCE_NODE}'", path=where)
    if GROUND_NODE not in nodes_all:
        raise NetworkError(f"no part connects to the return node '{GROUND_NODE}'", path=where)
    touching: dict[str, list[str]] = {n: [] for n in nodes_all}
    for name, a, b in parts:
        touching[a].append(name)
        touching[b].append(name)
    for n, names_at in touching.items():
        if len(names_at) == 1 and n not in (SOURCE_NODE, GROUND_NODE):
            raise NetworkError(f"node '{n}' connects to part {names_at[0]} only: a dangling end "
                               "(a misspelt node name?)", path=where, key=f"part {names_at[0]}")
    parent = {n: n for n in nodes_all}

    def root(n: str) -> str:
        while parent[n] != n:
            parent[n] = parent[parent[n]]
            n = parent[n]
        return n

    for _, a, b in parts:
        parent[root(a)] = root(b)
    src = root(SOURCE_NODE)
    if root(GROUND_NODE) != src:
        raise NetworkError(f"node '{SOURCE_NODE}' has no path to '{GROUND_NODE}' through the parts", path=where)
    for name, a, b in parts:
        if root(a) != src:
            raise NetworkError(f"part {name} is in an island not connected to the source (nodes {a}, {b})",
                               path=where, key=f"part {name}")


@dataclass(frozen=True)
class _Edge:
    """A branch of the reduced network: one part, or a series chain of valued parts, between nodes a and b."""

    a: str
    b: str
    members: tuple[int, ...]  # indices into net.branches


def reduce_series_chains(net: Network) -> list[_Edge]:
    """Merge series chains of valued parts into single edges.

    A node other than "in" and "0" where exactly two parts meet, neither of them
    a driver, carries no information the solver needs: the chain through it is
    one impedance (the sum of its parts'). Chains that close on themselves carry
    no current and are dropped.

    Parameters
    ----------
    net : Network
        The netlist (:class:`~xo_fit.solver.network.Network`).

    Returns
    -------
    list of _Edge
        The reduced network's edges, each with its end nodes and its members (indices into ``net.branches``,
        in order along the chain), ordered by the branch each chain was walked from; a part outside any chain
        is an edge of its own.
    """
    ends: dict[str, list[int]] = {}
    for j, br in enumerate(net.branches):
        ends.setdefault(br.a, []).append(j)
        ends.setdefault(br.b, []).append(j)
    inner = {n for n, js in ends.items()
             if n not in (SOURCE_NODE, GROUND_NODE) and len(js) == 2
             and all(net.branches[j].kind != "D" for j in js)}
    seen: set[int] = set()
    edges: list[_Edge] = []
    for j, br in enumerate(net.branches):
        if j in seen:
            continue
        if br.a in inner and br.b in inner:
            continue  # start chains from an end
        # walk from this branch through inner nodes
        members = [j]
        seen.add(j)
        start = br.b if br.a in inner else br.a
        node = br.a if br.a in inner else br.b
        while node in inner:
            nxt = next(k for k in ends[node] if k != members[-1])
            if nxt in seen:
                break
            members.append(nxt)
            seen.add(nxt)
            other = net.branches[nxt]
            node = other.b if other.a == node else other.a
        if node != start:
            edges.append(_Edge(a=start, b=node, members=tuple(members)))
    return edges
