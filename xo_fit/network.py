"""The crossover netlist: compiled once, then solved for whole batches of part values.

A network is a set of two-terminal parts between named nodes. Node ``"in"`` is
the source's positive terminal and ``"0"`` its return; the source has a
voltage ``Vs`` and a series resistance ``Rs``. Each part is a series branch:

* R: Z = R;
* L: Z = r + j w L, with r its DC resistance (fixed ohms, or the wire law
  r = a L^0.6 of :mod:`xo_fit.coils`, so a coil moved by the search keeps its
  copper);
* C: Z = esr + 1 / (j w C);
* a driver: its measured complex impedance on the grid.

:func:`compile_network` checks the netlist (names, islands, dangling nodes)
and generates, for this topology, straight-line code that assembles the nodal
admittance matrix and eliminates it symbolically: only structurally non-zero
entries are computed, fill-in is tracked, the matrix symmetry is used, and
real and imaginary parts are kept apart so that the frequency loop (innermost)
vectorises. The code is compiled by numba and cached on disk, keyed by its own
text. :meth:`Network.solve` then maps values of shape (B, P) to driver terminal
voltages (B, D, F) and the input impedance (B, F) with no Python loop over
candidates or frequencies.

Gaussian elimination without pivoting is safe for these matrices as long as no
pivot becomes small against the admittances meeting at its node; the kernel
measures that for every (candidate, frequency) and those few points (for
example an ideal series LC at its exact resonance) are solved again by
:func:`solve_dense`, a plain pivoting solve of the full matrix that is also the
reference every fast path is tested against.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import NetworkError

SOURCE_NODE = "in"
GROUND_NODE = "0"
#: A pivot smaller than this fraction of the summed |admittance| at its node sends the point to the dense solve.
PIVOT_TOLERANCE = 1e-3
#: Bump when the generated code changes meaning, so stale caches are not reused.
KERNEL_VERSION = 2


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


# ----------------------------------------------------------------------------- compile


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


def compile_network(branches: list[Branch], driver_names: list[str], frequencies: np.ndarray,
                    driver_impedance: np.ndarray, source_voltage: float, source_resistance: float,
                    *, context: str | None = None) -> "Network":
    """Check a netlist and build its solver.

    Parameters
    ----------
    branches: every part, valued ones (R, L, C) in the order of the values' columns.
    driver_names: names along the driver axis D; each must be used by exactly one "D" branch.
    frequencies: Hz, shape (F,), strictly rising, above 0.
    driver_impedance: complex (D, F), ohm.
    source_voltage: V. source_resistance: ohm, zero or more.

    Raises
    ------
    NetworkError
        Shorted parts, nodes with one connection, parts or nodes cut off from the source.
    """
    check_topology([(br.name, br.a, br.b) for br in branches], context=context)
    where = context
    used = [br.driver for br in branches if br.kind == "D"]
    if sorted(used) != list(range(len(driver_names))):
        raise NetworkError("every driver must be wired in by exactly one driver part", path=where)

    f = np.ascontiguousarray(frequencies, dtype=float)
    if f.ndim != 1 or f.size < 1 or np.any(f <= 0) or np.any(np.diff(f) <= 0):
        raise NetworkError("frequencies must be a strictly rising 1-D array above 0 Hz", path=where)
    zd = np.asarray(driver_impedance, dtype=complex)
    if zd.shape != (len(driver_names), f.size):
        raise ValueError(f"driver_impedance must have shape (D, F) = {(len(driver_names), f.size)}, got {zd.shape}")
    if not np.all(np.isfinite(zd)) or np.any(zd.real < 0) or np.any(zd == 0):
        bad = int(np.argwhere(~np.isfinite(zd) | (zd.real < 0) | (zd == 0))[0, 0])
        raise NetworkError(f"driver '{driver_names[bad]}' has a non-finite, zero or negative-real impedance "
                           "on the grid (a passive driver has Re Z > 0)", path=where)
    if source_resistance < 0:
        raise NetworkError("source resistance must be zero or more", path=where)
    return Network(branches=tuple(branches), driver_names=tuple(driver_names), frequencies=f,
                   driver_impedance=zd, source_voltage=float(source_voltage),
                   source_resistance=float(source_resistance))


@dataclass(eq=False)
class Network:
    """A compiled netlist on a fixed grid. Picklable: the kernel is rebuilt (from the disk cache) on demand."""

    branches: tuple[Branch, ...]
    driver_names: tuple[str, ...]
    frequencies: np.ndarray
    driver_impedance: np.ndarray
    source_voltage: float
    source_resistance: float
    _kernel: object = field(default=None, repr=False)

    # --- structure ---------------------------------------------------------------------------

    @property
    def valued(self) -> tuple[Branch, ...]:
        """Branches that take a value (R, L, C), in the order of the values' columns P."""
        return tuple(b for b in self.branches if b.kind != "D")

    @property
    def unknown_nodes(self) -> tuple[str, ...]:
        """Nodes whose voltage is solved for: all but "0", and but "in" when Rs = 0."""
        nodes = sorted({n for br in self.branches for n in (br.a, br.b)} - {GROUND_NODE})
        if self.source_resistance == 0.0:
            nodes.remove(SOURCE_NODE)
        return tuple(nodes)

    @property
    def omega(self) -> np.ndarray:
        return 2 * np.pi * self.frequencies

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        state["_kernel"] = None
        state.pop("_args", None)
        return state

    # --- solving -----------------------------------------------------------------------------

    def _check_values(self, values: np.ndarray) -> np.ndarray:
        v = np.asarray(values, dtype=float)
        if v.ndim == 1:
            v = v[None, :]
        p = len(self.valued)
        if v.ndim != 2 or v.shape[1] != p:
            raise ValueError(f"values must have shape (B, {p}), got {np.shape(values)}")
        if not np.all(np.isfinite(v)) or np.any(v <= 0):
            raise ValueError("part values must be finite and above zero")
        return np.ascontiguousarray(v)

    def solve(self, values: np.ndarray) -> Solution:
        """Driver voltages and input impedance for a batch of value sets.

        Parameters
        ----------
        values: shape (B, P) or (P,): the value of every R (ohm), L (H) and C (F), in
            the order of :attr:`valued`.

        Returns
        -------
        Solution with voltages (B, D, F) complex V and impedance (B, F) complex ohm
        (views into one array).
        """
        return self.solve_compiled(values)

    def solve_compiled(self, values: np.ndarray) -> Solution:
        """:meth:`solve` through the generated kernel whatever the batch size (flagged points densely)."""
        v = self._check_values(values)
        kernel = self.kernel()
        k = self._kernel_args()
        d = len(self.driver_names)
        nf = self.frequencies.size
        res = np.empty((v.shape[0], d + 1, nf), dtype=complex)
        bad = np.empty((v.shape[0], nf))
        scratch = np.empty((2 * d + 3, nf))
        nbad = kernel(v, k["r_coef"], k["r_exp"], k["fin"], self.source_voltage, self.source_resistance,
                      PIVOT_TOLERANCE**2, scratch, res.view(np.float64), bad)
        if nbad:
            redo = np.nonzero(~(bad <= 0.0))  # positive or NaN
            sol = solve_dense(self, v[redo[0]], redo[1])
            res[redo[0], :d, redo[1]] = sol.voltages
            res[redo[0], d, redo[1]] = sol.impedance
        return Solution(voltages=res[:, :d], impedance=res[:, d])

    def solve_reference(self, values: np.ndarray) -> Solution:
        """The same as :meth:`solve` through a dense pivoting solve of the full nodal matrix (slow, exact)."""
        v = self._check_values(values)
        bsz, nf = v.shape[0], self.frequencies.size
        bi, fi = np.meshgrid(np.arange(bsz), np.arange(nf), indexing="ij")
        sol = solve_dense(self, v[bi.ravel()], fi.ravel())
        return Solution(voltages=sol.voltages.reshape(bsz, nf, -1).transpose(0, 2, 1),
                        impedance=sol.impedance.reshape(bsz, nf))

    def _kernel_args(self) -> dict:
        cached = self.__dict__.get("_args")
        if cached is None:
            valued = self.valued
            cached = {
                "r_coef": np.array([b.r_coef for b in valued], dtype=float),
                "r_exp": np.array([b.r_exp for b in valued], dtype=float),
                "fin": kernel_inputs(self),
            }
            self.__dict__["_args"] = cached
        return cached

    def kernel(self):
        """The compiled kernel for this topology (generated, compiled and cached on first use)."""
        if self._kernel is None:
            self._kernel = load_kernel(generate_kernel_source(self))
        return self._kernel

    def series_resistance(self, values: np.ndarray) -> np.ndarray:
        """r of every valued branch (DCR of coils, ESR of capacitors), ohm, shape (B, P)."""
        k = self._kernel_args()
        return k["r_coef"] * np.asarray(values, dtype=float) ** k["r_exp"]


# ----------------------------------------------------------------------------- dense reference


def branch_admittances(net: Network, values: np.ndarray, f_index: np.ndarray) -> np.ndarray:
    """Admittance of every branch, siemens, shape (M, len(branches)) for M (values row, frequency) pairs.

    values: (M, P); f_index: (M,) indices into the grid.
    """
    w = net.omega[f_index]
    out = np.empty((values.shape[0], len(net.branches)), dtype=complex)
    col = 0
    r = net.series_resistance(values)
    for j, br in enumerate(net.branches):
        if br.kind == "D":
            out[:, j] = 1.0 / net.driver_impedance[br.driver, f_index]
            continue
        x = values[:, col]
        if br.kind == "R":
            z = x + 0j
        elif br.kind == "L":
            z = r[:, col] + 1j * w * x
        else:
            z = r[:, col] + 1.0 / (1j * w * x)
        out[:, j] = 1.0 / z
        col += 1
    return out


def _dense_nodes(net: Network, values: np.ndarray, f_index: np.ndarray):
    """Assemble and solve the full nodal system (LAPACK, pivoting) for M (values row, frequency index) pairs.

    Returns (volt, y): volt(node) gives that node's voltage (M,) complex, y the branch admittances (M, branches).
    """
    values = np.asarray(values, dtype=float)
    f_index = np.asarray(f_index)
    m = values.shape[0]
    nodes = net.unknown_nodes
    idx = {n: i for i, n in enumerate(nodes)}
    n = len(nodes)
    y = branch_admittances(net, values, f_index)
    mat = np.zeros((m, n, n), dtype=complex)
    rhs = np.zeros((m, n), dtype=complex)
    vs = net.source_voltage
    fixed = {GROUND_NODE: 0.0}
    if net.source_resistance == 0.0:
        fixed[SOURCE_NODE] = vs
    else:
        mat[:, idx[SOURCE_NODE], idx[SOURCE_NODE]] += 1.0 / net.source_resistance
        rhs[:, idx[SOURCE_NODE]] += vs / net.source_resistance
    for j, br in enumerate(net.branches):
        ia, ib = idx.get(br.a), idx.get(br.b)
        if ia is not None:
            mat[:, ia, ia] += y[:, j]
        if ib is not None:
            mat[:, ib, ib] += y[:, j]
        if ia is not None and ib is not None:
            mat[:, ia, ib] -= y[:, j]
            mat[:, ib, ia] -= y[:, j]
        if ia is not None and br.b in fixed:
            rhs[:, ia] += y[:, j] * fixed[br.b]
        if ib is not None and br.a in fixed:
            rhs[:, ib] += y[:, j] * fixed[br.a]
    x = np.linalg.solve(mat, rhs[..., None])[..., 0] if n else np.zeros((m, 0), dtype=complex)

    def volt(node: str) -> np.ndarray:
        if node in fixed:
            return np.full(m, fixed[node], dtype=complex)
        return x[:, idx[node]]

    return volt, y


def solve_dense(net: Network, values: np.ndarray, f_index: np.ndarray) -> Solution:
    """Plain nodal analysis with LAPACK's pivoting solve, for M (values row, frequency index) pairs.

    Returns voltages (M, D) and impedance (M,) (a Solution with the F axis dropped).
    """
    volt, y = _dense_nodes(net, values, f_index)
    m = y.shape[0]
    volts = np.zeros((m, len(net.driver_names)), dtype=complex)
    current = np.zeros(m, dtype=complex)
    for j, br in enumerate(net.branches):
        if br.kind == "D":
            volts[:, br.driver] = volt(br.a) - volt(br.b)
        if br.a == SOURCE_NODE:
            current += y[:, j] * (volt(br.a) - volt(br.b))
        elif br.b == SOURCE_NODE:
            current += y[:, j] * (volt(br.b) - volt(br.a))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = volt(SOURCE_NODE) / current
    return Solution(voltages=volts, impedance=z)


# ----------------------------------------------------------------------------- code generation


def _render(terms: list[tuple[int, str]]) -> str:
    """Render signed terms [(+1, "a"), (-1, "b * c")] as "a - b * c"."""
    expr = ""
    for sign, term in terms:
        if not expr:
            expr = term if sign > 0 else f"-{term}"
        else:
            expr += f" + {term}" if sign > 0 else f" - {term}"
    return expr


class _Emitter:
    """Emits straight-line real arithmetic for complex values kept as (re, im) names; None is a zero part."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.count = 0

    def let(self, expr: str, stem: str = "t") -> str:
        self.count += 1
        name = f"{stem}{self.count}"
        self.lines.append(f"{name} = {expr}")
        return name

    def _pair(self, re_terms: list, im_terms: list, stem: str) -> tuple:
        return (self.let(_render(re_terms), stem + "r") if re_terms else None,
                self.let(_render(im_terms), stem + "i") if im_terms else None)

    def sum(self, terms: list[tuple[int, tuple]], stem: str = "a") -> tuple:
        """Sum of sign * value over terms; returns a complex pair (names or None)."""
        return self._pair([(s, v[0]) for s, v in terms if v[0]], [(s, v[1]) for s, v in terms if v[1]], stem)

    @staticmethod
    def _products(x: tuple, y: tuple, sign: int) -> tuple[list, list]:
        """Signed terms of sign * x * y, real and imaginary."""
        xr, xi = x
        yr, yi = y
        re = [(sign, f"{xr} * {yr}")] if xr and yr else []
        re += [(-sign, f"{xi} * {yi}")] if xi and yi else []
        im = [(sign, f"{xr} * {yi}")] if xr and yi else []
        im += [(sign, f"{xi} * {yr}")] if xi and yr else []
        return re, im

    def mul(self, x: tuple, y: tuple, stem: str = "m") -> tuple:
        return self._pair(*self._products(x, y, 1), stem)

    def fms(self, acc: tuple, x: tuple, y: tuple, stem: str = "a") -> tuple:
        """acc - x * y, one expression per part (so the compiler can contract it to fused multiply-adds)."""
        re, im = self._products(x, y, -1)
        if not re and not im:
            return acc
        re = ([(1, acc[0])] if acc[0] else []) + re
        im = ([(1, acc[1])] if acc[1] else []) + im
        return self._pair(re, im, stem)


def _order(nodes: list[str], adj: dict[str, set[str]], rhs: set[str], dissipative: set[str]) -> list[str]:
    """Greedy minimum-degree elimination order with fill-in; ties: no RHS first, dissipative first, by name."""
    adj = {n: set(a) for n, a in adj.items()}
    left = list(nodes)
    order = []
    while left:
        best = min(left, key=lambda n: (len(adj[n]), n in rhs, n not in dissipative, n))
        nb = adj[best]
        for i in nb:
            adj[i] |= nb - {i}
            adj[i].discard(best)
        if best in rhs:
            rhs |= nb
        left.remove(best)
        order.append(best)
    return order


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


def _batch_reciprocal(e: "_Emitter", dens: list[str], traps: list[str], stem: str) -> list[str]:
    """Reciprocals of several independent reals with one division (Montgomery's trick, tree-shaped).

    The values are multiplied pairwise up a balanced tree, the root is
    inverted once, and the inverse is pushed back down (1/(ab) * b = 1/a), so
    n reciprocals cost one division and about 3n multiplications with a
    dependency depth of only 2 log2(n) multiplications: the kernel is bound
    by latency, not by arithmetic. ``traps`` receives a name that is NaN when
    the product over- or underflowed, so that the point is solved again by
    the dense path instead of silently returning zeros.
    """
    if len(dens) == 1:
        inv = e.let(f"1.0 / {dens[0]}", stem)
        traps.append(e.let(f"{dens[0]} * {inv}", stem + "t"))
        return [inv]
    # build the tree bottom-up: levels[0] = leaves
    levels = [list(dens)]
    while len(levels[-1]) > 1:
        prev = levels[-1]
        nxt = [e.let(f"{prev[i]} * {prev[i + 1]}", stem + "c") if i + 1 < len(prev) else prev[i]
               for i in range(0, len(prev), 2)]
        levels.append(nxt)
    root = levels[-1][0]
    inv = e.let(f"1.0 / {root}", stem + "n")
    traps.append(e.let(f"{root} * {inv}", stem + "t"))
    invs = [inv]
    for depth in range(len(levels) - 2, -1, -1):
        prev = levels[depth]
        down = []
        for i in range(0, len(prev), 2):
            parent = invs[i // 2]
            if i + 1 < len(prev):
                down.append(e.let(f"{parent} * {prev[i + 1]}", stem + "r"))
                down.append(e.let(f"{parent} * {prev[i]}", stem + "r"))
            else:
                down.append(parent)
        invs = down
    return invs


def kernel_inputs(net: Network) -> np.ndarray:
    """The frequency-dependent kernel input ``fin``: rows w, 1/w, then Re and Im of each driver's admittance."""
    y = 1.0 / net.driver_impedance
    rows = [net.omega, 1.0 / net.omega]
    for k in range(y.shape[0]):
        rows += [y[k].real, y[k].imag]
    return np.ascontiguousarray(np.vstack(rows))


@dataclass(frozen=True)
class SolverCode:
    """Straight-line code that solves one network at one (candidate b, frequency f) point.

    prep: lines per candidate (outside the frequency loop), reading ``vals[b, :]``;
    loads: lines reading the frequency-dependent inputs from ``fin[:, f]``;
    body: the solve and the pivot check, ending with ``bad`` (positive or NaN: redo densely);
    volts: (re, im) names of each driver's terminal voltage, by driver index ("0.0" for a zero part);
    zin: (re, im) names of the input impedance; comment: lines describing the reduced network.
    """

    prep: tuple[str, ...]
    loads: tuple[str, ...]
    body: tuple[str, ...]
    volts: tuple[tuple[str, str], ...]
    zin: tuple[str, str]
    comment: tuple[str, ...]


def solver_code(net: Network) -> SolverCode:
    """Generate the solver's straight-line code for ``net`` (see :func:`generate_kernel_source`)."""
    e = _Emitter()
    edges = reduce_series_chains(net)
    col_of = {}
    col = 0
    for j, br in enumerate(net.branches):
        if br.kind != "D":
            col_of[j] = col
            col += 1

    # ---- per candidate: the constants of every edge
    prep: list[str] = []
    for j, br in enumerate(net.branches):
        if br.kind == "D":
            continue
        c = col_of[j]
        prep.append(f"x_{j} = vals[b, {c}]")
        if br.kind in ("L", "C") and br.r_coef != 0.0:
            prep.append(f"r_{j} = r_coef[{c}] * x_{j} ** r_exp[{c}]" if br.r_exp else f"r_{j} = r_coef[{c}]")
    forms = []  # per edge: ("D", driver) | ("G", name) | ("jwC", name) | ("L0", name) | ("Z", zr, ls, ss)
    for ei, edge in enumerate(edges):
        brs = [net.branches[j] for j in edge.members]
        if len(brs) == 1 and brs[0].kind == "D":
            forms.append(("D", brs[0].driver))
            continue
        if len(brs) == 1 and not brs[0].lossy:
            j = edge.members[0]
            kind = brs[0].kind
            if kind == "R":
                prep.append(f"g_{j} = 1.0 / x_{j}")
                forms.append(("G", f"g_{j}"))
            elif kind == "C":
                forms.append(("jwC", f"x_{j}"))
            else:
                prep.append(f"il_{j} = 1.0 / x_{j}")
                forms.append(("L0", f"il_{j}"))
            continue
        zr, ls, ss = [], [], []
        for j, br in zip(edge.members, brs):
            if br.kind == "R":
                zr.append(f"x_{j}")
            elif br.kind == "L":
                ls.append(f"x_{j}")
                if br.r_coef:
                    zr.append(f"r_{j}")
            else:
                ss.append(f"1.0 / x_{j}")
                if br.r_coef:
                    zr.append(f"r_{j}")
        names = []
        for tag, terms in (("zr", zr), ("ls", ls), ("ss", ss)):
            if terms:
                prep.append(f"{tag}_{ei} = {' + '.join(terms)}")
                prep.append(f"{tag}2_{ei} = {tag}_{ei} * {tag}_{ei}") if tag == "zr" else None
                names.append(f"{tag}_{ei}")
            else:
                names.append(None)
        forms.append(("Z", *names, ei))

    # ---- per frequency: edge admittances, with every division batched into one
    traps: list[str] = []
    loads = ["w = fin[0, f]", "iw = fin[1, f]"]
    ys: list[tuple] = []
    pending = []  # (edge index, zr, zi name) needing 1/|z|^2
    for ei, form in enumerate(forms):
        if form[0] == "D":
            dd = form[1]
            loads += [f"yd{dd}r = fin[{2 + 2 * dd}, f]", f"yd{dd}i = fin[{3 + 2 * dd}, f]"]
            ys.append((f"yd{dd}r", f"yd{dd}i"))
        elif form[0] == "G":
            ys.append((form[1], None))
        elif form[0] == "jwC":
            ys.append((None, e.let(f"w * {form[1]}", "y")))
        elif form[0] == "L0":
            ys.append((None, e.let(f"-iw * {form[1]}", "y")))
        else:
            _, zr, ls, ss, k = form
            parts = ([f"w * {ls}"] if ls else []) + ([f"- iw * {ss}"] if ss else [])
            zi = e.let(" ".join(parts).lstrip("+ ").replace("- ", "-", 1) if parts[0].startswith("-") else " ".join(parts), "zi") if parts else None
            if zr and zi:
                den = e.let(f"zr2_{k} + {zi} * {zi}", "zd")
            elif zr:
                den = f"zr2_{k}"
            else:
                den = e.let(f"{zi} * {zi}", "zd")
            pending.append((ei, zr, zi, den))
            ys.append(None)
    if pending:
        invs = _batch_reciprocal(e, [p[3] for p in pending], traps, "iz")
        for (ei, zr, zi, _), inv in zip(pending, invs):
            ys[ei] = (e.let(f"{zr} * {inv}", "yr") if zr else None, e.let(f"-{zi} * {inv}", "yi") if zi else None)
    body_y = e.lines
    e.lines = []

    # ---- assembly of the symmetric nodal matrix (upper triangle) and the right-hand side,
    #      for 1 V at "in" (the source resistance is applied afterwards, Thevenin-wise)
    nodes = sorted({n for ed in edges for n in (ed.a, ed.b)} - {GROUND_NODE, SOURCE_NODE})
    idx = {n: i for i, n in enumerate(nodes)}
    entries: dict[tuple[int, int], list] = {}
    rhs_terms: dict[int, list] = {}
    scale_terms: dict[int, list[str]] = {i: [] for i in range(len(nodes))}
    dissipative = set()
    for ei, ed in enumerate(edges):
        ia, ib = idx.get(ed.a), idx.get(ed.b)
        if ia is not None or ib is not None:
            # |Re y| + |Im y| of the edge, using the signs known from its form (Re y >= 0 always,
            # Im y > 0 for an ideal C, < 0 for an ideal L)
            yr_, yi_ = ys[ei]
            kind = forms[ei][0]
            if kind == "G":
                mag_e = yr_
            elif kind == "jwC":
                mag_e = yi_
            elif kind == "L0":
                mag_e = e.let(f"-{yi_}", "ye")
            else:
                mag_e = e.let(" + ".join(([yr_] if yr_ else []) + ([f"abs({yi_})"] if yi_ else [])), "ye")
        for i in (ia, ib):
            if i is not None:
                entries.setdefault((i, i), []).append((1, ys[ei]))
                scale_terms[i].append(mag_e)
                if forms[ei][0] in ("D", "G", "Z"):
                    dissipative.add(nodes[i])
        if ia is not None and ib is not None:
            entries.setdefault((min(ia, ib), max(ia, ib)), []).append((-1, ys[ei]))
        if ia is not None and ed.b == SOURCE_NODE:
            rhs_terms.setdefault(ia, []).append(ys[ei])
        if ib is not None and ed.a == SOURCE_NODE:
            rhs_terms.setdefault(ib, []).append(ys[ei])
    a: dict[tuple[int, int], tuple] = {}
    for key in sorted(entries):
        a[key] = e.sum(entries[key], f"a{key[0]}_{key[1]}_")
    rhs: dict[int, tuple] = {}
    for i, terms in sorted(rhs_terms.items()):
        rhs[i] = e.sum([(1, t) for t in terms], f"b{i}_")

    adj = {n: set() for n in nodes}
    for (i, k) in a:
        if i != k:
            adj[nodes[i]].add(nodes[k])
            adj[nodes[k]].add(nodes[i])
    order = [idx[n] for n in _order(nodes, adj, {nodes[i] for i in rhs}, dissipative)]

    def get(i: int, k: int) -> tuple:
        return a.get((min(i, k), max(i, k)), (None, None))

    # ---- elimination: symbolic, with fill-in; pivots of one elimination-tree level share one division
    struct = {k: set() for k in range(len(nodes))}
    for (i, k) in a:
        if i != k:
            struct[i].add(k)
            struct[k].add(i)
    level: dict[int, int] = {}
    nbrs_at: dict[int, list[int]] = {}
    left = set(range(len(nodes)))
    for k in order:
        left.discard(k)
        nb = sorted(struct[k] & left)
        nbrs_at[k] = nb
        level.setdefault(k, 0)
        for i in nb:
            struct[i] |= set(nb) - {i}
            level[i] = max(level.get(i, 0), level[k] + 1)
    inv_piv: dict[int, tuple] = {}
    urow: dict[int, dict[int, tuple]] = {}
    rhs_at: dict[int, tuple] = {}
    mags: dict[int, str] = {}
    for lv in sorted(set(level.values())):
        group = [k for k in order if level[k] == lv]
        dens = []
        for k in group:
            pr, pi = get(k, k)
            if pr and pi:
                mags[k] = e.let(f"{pr} * {pr} + {pi} * {pi}", f"q{k}_m")
            elif pr or pi:
                mags[k] = e.let(f"{pr or pi} * {pr or pi}", f"q{k}_m")
            else:
                raise NetworkError("internal: a structurally zero pivot")
            dens.append(mags[k])
        invs = _batch_reciprocal(e, dens, traps, f"ip{lv}_")
        for k, inv in zip(group, invs):
            pr, pi = get(k, k)
            inv_piv[k] = (e.let(f"{pr} * {inv}", f"q{k}_r") if pr else None,
                          e.let(f"-{pi} * {inv}", f"q{k}_i") if pi else None)
        for k in group:
            nb = nbrs_at[k]
            urow[k] = {i: get(k, i) for i in nb}
            rhs_at[k] = rhs.get(k, (None, None))
            t = {i: e.mul(get(k, i), inv_piv[k], f"l{k}_{i}_") for i in nb}
            for ii, i in enumerate(nb):
                for jj in nb[ii:]:
                    key = (min(i, jj), max(i, jj))
                    a[key] = e.fms(a.get(key, (None, None)), t[i], get(k, jj), f"a{key[0]}_{key[1]}_")
                if rhs_at[k] != (None, None):
                    rhs[i] = e.fms(rhs.get(i, (None, None)), t[i], rhs_at[k], f"b{i}_")

    # ---- back substitution, only for the node voltages the outputs need
    need: set[int] = set()
    for ed, form in zip(edges, forms):
        if form[0] == "D" or SOURCE_NODE in (ed.a, ed.b):
            need.update(idx[n] for n in (ed.a, ed.b) if n in idx)
    for k in order:
        if k in need:
            need.update(urow[k])
    x: dict[int, tuple] = {}
    for k in reversed(order):
        if k not in need:
            continue
        acc = rhs_at[k]
        for i, u in urow[k].items():
            acc = e.fms(acc, u, x[i], f"s{k}_")
        x[k] = e.mul(acc, inv_piv[k], f"x{k}_") if acc != (None, None) else (None, None)

    def volt(node: str) -> tuple:
        """Node voltage per volt at "in"."""
        if node == GROUND_NODE:
            return (None, None)
        if node == SOURCE_NODE:
            return ("1.0", None)
        return x[idx[node]]

    # ---- the current drawn at 1 V, the input impedance, and the source applied through Rs:
    #      Z = 1 / I1;  V(in) = vs / (1 + Rs I1);  every node voltage scales by V(in)
    cur_terms = []
    for ei, ed in enumerate(edges):
        if SOURCE_NODE in (ed.a, ed.b):
            other = ed.b if ed.a == SOURCE_NODE else ed.a
            dv = e.sum([(1, volt(SOURCE_NODE)), (-1, volt(other))], f"dv{ei}_")
            cur_terms.append(e.mul(ys[ei], dv, f"c{ei}_"))
    cr, ci = e.sum([(1, c) for c in cur_terms], "ci_")
    if cr is None and ci is None:
        raise NetworkError("internal: no current path from the source")
    cm = e.let(" + ".join(f"{p} * {p}" for p in (cr, ci) if p), "cm")
    d = len(net.driver_names)
    trap_terms = list(traps)
    if net.source_resistance > 0.0:
        sr = e.let(f"1.0 + rs * {cr}" if cr else "1.0", "sd")
        si = e.let(f"rs * {ci}", "sd") if ci else None
        sm = e.let(f"{sr} * {sr}" + (f" + {si} * {si}" if si else ""), "sm")
        inv_c, inv_s = _batch_reciprocal(e, [cm, sm], traps, "iv")
        scale = (e.let(f"vs * {sr} * {inv_s}", "vr"), e.let(f"-vs * {si} * {inv_s}", "vi") if si else None)
    else:
        inv_c = e.let(f"1.0 / {cm}", "cn")
        traps.append(e.let(f"{cm} * {inv_c}", "cnt"))
        scale = ("vs", None)
    trap_terms = list(traps)
    zin = (e.let(f"{cr} * {inv_c}", "zr") if cr else None, e.let(f"-{ci} * {inv_c}", "zi") if ci else None)
    volts: dict[int, tuple[str, str]] = {}
    for ed, form in zip(edges, forms):
        if form[0] == "D":
            u = e.sum([(1, volt(ed.a)), (-1, volt(ed.b))], f"u{form[1]}_")
            v = e.mul(u, scale, f"v{form[1]}_")
            volts[form[1]] = (v[0] or "0.0", v[1] or "0.0")
            trap_terms.extend(x for x in v if x)
    trap_terms.extend(x for x in zin if x)
    body_solve = e.lines
    e.lines = []

    # ---- pivot checks: |p|^2 >= tau2 (sum |y| at the node)^2, and a NaN trap over everything produced
    check = []
    margins = []
    for k in order:
        sc = f"sc{k}"
        check.append(f"{sc} = {' + '.join(scale_terms[k]) or '0.0'}")
        margins.append(f"tau2 * {sc} * {sc} - {mags[k]}")
    if margins:
        check.append(f"bad = {margins[0]}")
        check += [f"bad = max(bad, {m})" for m in margins[1:]]
    else:
        check.append("bad = -1.0")
    check.append(f"bad = bad + 0.0 * ({' + '.join(trap_terms)})")
    return SolverCode(
        prep=tuple(prep), loads=tuple(loads), body=tuple(body_y + body_solve + check),
        volts=tuple(volts[i] for i in range(d)), zin=(zin[0] or "0.0", zin[1] or "0.0"),
        comment=(f"# edges: {[(ed.a, ed.b, [net.branches[j].name for j in ed.members]) for ed in edges]}",
                 f"# unknown nodes {nodes}; elimination order {[nodes[k] for k in order]}"))


def generate_kernel_source(net: Network) -> str:
    """Python source of a numba kernel that solves ``net`` for a batch of values on its grid.

    Signature: ``kernel(vals (B, P), r_coef (P,), r_exp (P,), fin (K, F), vs, rs, tau2,
    scratch (2 D + 3, F), out (B, D + 1, 2 F) float64 (a complex array's view), out_bad (B, F)) -> int``.
    ``out[:, :D]`` holds the driver voltages, ``out[:, D]`` the input impedance;
    ``out_bad`` is positive (or NaN) where some pivot fell below sqrt(tau2) of
    its node's admittance scale or a value over- or underflowed, and the return
    value counts those points. Node "in" is not an unknown: the network is
    solved for 1 V there and the source (vs behind rs) applied afterwards.

    The solve runs per candidate into the planar ``scratch``, then a short loop
    interleaves it into the complex output: LLVM vectorises the frequency loop
    only with few arrays and few written rows (its runtime alias checks are
    capped), and not around interleaved complex stores.
    """
    code = solver_code(net)
    d = len(net.driver_names)
    outs = []
    for i, (vr, vi) in enumerate(code.volts):
        outs += [f"scratch[{2 * i}, f] = {vr}", f"scratch[{2 * i + 1}, f] = {vi}"]
    outs += [f"scratch[{2 * d}, f] = {code.zin[0]}", f"scratch[{2 * d + 1}, f] = {code.zin[1]}",
             f"scratch[{2 * d + 2}, f] = bad"]
    ind1, ind2 = " " * 8, " " * 12
    src = [
        "# generated by xo_fit.network.generate_kernel_source; do not edit",
        f"# kernel version {KERNEL_VERSION}",
        *code.comment,
        "import numba",
        "",
        "",
        '@numba.njit(cache=True, error_model="numpy", fastmath={"contract"}, nogil=True)',
        "def kernel(vals, r_coef, r_exp, fin, vs, rs, tau2, scratch, out, out_bad):",
        "    nb = vals.shape[0]",
        "    nf = fin.shape[1]",
        "    nbad = 0",
        "    for b in range(nb):",
    ]
    src += [ind1 + s for s in code.prep] or [ind1 + "pass"]
    src.append(ind1 + "for f in range(nf):")
    src += [ind2 + s for s in code.loads + code.body + tuple(outs)]
    src.append(ind1 + "for f in range(nf):")
    for i in range(d + 1):  # into the complex result seen as float64 (B, D + 1, 2 F): 6 % faster than complex()
        src += [ind2 + f"out[b, {i}, 2 * f] = scratch[{2 * i}, f]", ind2 + f"out[b, {i}, 2 * f + 1] = scratch[{2 * i + 1}, f]"]
    src += [ind2 + f"bv = scratch[{2 * d + 2}, f]", ind2 + "out_bad[b, f] = bv", ind2 + "if not bv <= 0.0:",
            ind2 + "    nbad += 1"]
    src.append("    return nbad")
    return "\n".join(src) + "\n"


# ----------------------------------------------------------------------------- kernel cache


def cache_dir() -> Path:
    """Folder for generated kernels and numba's compiled objects: $XO_FIT_CACHE, else ~/.cache/xo_fit."""
    env = os.environ.get("XO_FIT_CACHE")
    base = Path(env) if env else Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "xo_fit"
    folder = base / "kernels"
    try:
        folder.mkdir(parents=True, exist_ok=True)
        probe = folder / f".probe{os.getpid()}"
        probe.write_text("")
        probe.unlink()
    except OSError:
        folder = Path(tempfile.gettempdir()) / f"xo_fit-{os.getuid() if hasattr(os, 'getuid') else 'u'}" / "kernels"
        folder.mkdir(parents=True, exist_ok=True)
    return folder


_LOADED: dict[str, object] = {}


def _prefer_wide_vectors() -> None:
    """On AVX-512 hosts let LLVM use 512-bit vectors (it prefers 256 by default).

    Measured on the reference network here: 18-30 % more sweeps per second. Only
    done when numba has not been imported yet and the user has not set
    NUMBA_CPU_FEATURES; XO_FIT_VECTOR_WIDTH=256 turns it off.
    """
    if "numba" in sys.modules or "NUMBA_CPU_FEATURES" in os.environ:
        return
    if os.environ.get("XO_FIT_VECTOR_WIDTH", "512") == "256":
        return
    try:
        import llvmlite.binding as llvm

        features = llvm.get_host_cpu_features().flatten()
    except Exception:  # pragma: no cover - no llvmlite host query: leave numba's defaults
        return
    if "+avx512f" in features.split(","):
        os.environ["NUMBA_CPU_FEATURES"] = features + ",-prefer-256-bit"


def load_kernel(source: str, entry: str = "kernel"):
    """Write ``source`` to the cache (once, atomically), import it and return its function ``entry``."""
    _prefer_wide_vectors()
    import numba

    digest = hashlib.sha256(f"{KERNEL_VERSION}\n{numba.__version__}\n{source}".encode()).hexdigest()[:20]
    if digest in _LOADED:
        return _LOADED[digest]
    folder = cache_dir()
    path = folder / f"xo_kernel_{digest}.py"
    if not path.exists() or path.read_text() != source:
        fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
        with os.fdopen(fd, "w") as fh:
            fh.write(source)
        os.replace(tmp, path)
    name = f"xo_fit_kernels.k_{digest}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    _LOADED[digest] = getattr(module, entry)
    return _LOADED[digest]


def branch_states(net: Network, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Voltage across and current through every branch of one design, from the dense solve.

    values: (P,) SI. Returns (voltage, current), complex (len(branches), F), for the source at
    ``net.source_voltage``; a branch's voltage is V(a) - V(b) and its current flows a -> b through it.
    """
    v = net._check_values(values)[:1]
    f_index = np.arange(net.frequencies.size)
    volt, y = _dense_nodes(net, np.repeat(v, f_index.size, axis=0), f_index)
    volts = np.stack([volt(br.a) - volt(br.b) for br in net.branches])
    return volts, volts * y.T
