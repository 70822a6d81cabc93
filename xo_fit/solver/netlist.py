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

    kind: "R", "L", "C" or "D" (driver).
    a, b: node names; current flows a -> b for positive voltage V(a) - V(b).
    r_coef, r_exp: series resistance r = r_coef * value**r_exp (L: DCR, C: ESR; R: unused).
    driver: index into the driver axis for kind "D".
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
        return self.kind in ("L", "C") and self.r_coef != 0.0


@dataclass
class Solution:
    """Result of a batched solve.

    voltages: complex (B, D, F), V(positive node) - V(negative node) of each driver, V.
    impedance: complex (B, F), input impedance at "in" against "0", ohm, without Rs.
    """

    voltages: np.ndarray
    impedance: np.ndarray


def check_topology(parts: list[tuple[str, str, str]], *, context: str | None = None) -> None:
    """Check a netlist given as (name, node a, node b) triples.

    Raises NetworkError (with ``key`` naming the part) for: a duplicate name, a
    part shorted onto one node, no part at "in" or "0", a node that only one
    part touches (a dangling end, usually a misspelt node), "in" with no path
    to "0", and parts in an island not connected to the source.
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
