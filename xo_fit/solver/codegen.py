"""Code generation: straight-line elimination code for one topology, as a kernel of the IR
(:mod:`xo_fit.solver.ir`, printed for numba and for the C compiler).

Series chains are merged (:func:`~xo_fit.solver.netlist.reduce_series_chains`),
the symmetric nodal matrix is assembled from per-candidate branch constants,
eliminated symbolically in a minimum-degree order with fill-in tracked, and
the outputs (driver voltages, input impedance, the pivot check) are written
for each (candidate, frequency) point. Real and imaginary parts are kept apart
so the frequency loop (innermost) vectorises.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from xo_fit.constants import GROUND_NODE, SOURCE_NODE
from xo_fit.errors import NetworkError
from xo_fit.solver.emitter import Emitter, batch_reciprocal, elimination_order
from xo_fit.solver.ir import (Array, Const, Expr, Function, Not, Return, Stmt, Var, absolute, assign, f8, i8, let, loop,
                              maximum, signed_sum, total, update, when)
from xo_fit.solver.ir_kernel import Kernel
from xo_fit.solver.ir_python import text as python_text
from xo_fit.solver.kernels import KERNEL_VERSION
from xo_fit.solver.netlist import reduce_series_chains

if TYPE_CHECKING:
    from xo_fit.solver.network import Network


def kernel_inputs(net: Network) -> np.ndarray:
    """The frequency-dependent kernel input ``fin`` of ``net``, shape (K, F) with K = 2 + 2 D, C-contiguous:
    rows w (rad/s), 1/w (s/rad), then Re and Im of each driver's admittance 1/Z (S), driver by driver."""
    y = 1.0 / net.driver_impedance
    rows = [net.omega, 1.0 / net.omega]
    for k in range(y.shape[0]):
        rows += [y[k].real, y[k].imag]
    return np.ascontiguousarray(np.vstack(rows))


#: The solver's arrays and scalars as the kernels name them (:func:`generate_kernel`, the fused cost's).
VALS, R_COEF, R_EXP, FIN = Array("vals", 2), Array("r_coef", 1), Array("r_exp", 1), Array("fin", 2)
VS, RS, TAU2 = f8("vs"), f8("rs"), f8("tau2")
#: The candidate's and the frequency's loop indices.
B, F = i8("b"), i8("f")


@dataclass(frozen=True)
class SolverCode:
    """Straight-line code (IR statements) that solves one network at one (candidate ``b``, frequency ``f``) point.

    Parameters
    ----------
    prep : tuple of Stmt
        Statements per candidate (outside the frequency loop), reading ``vals[b, :]``, ``r_coef`` and
        ``r_exp``; among their names ``x_J``, the value of ``net.branches[J]``, and ``r_J``, its series
        resistance.
    loads : tuple of Stmt
        Statements reading the frequency-dependent inputs from ``fin[:, f]``.
    body : tuple of Stmt
        The solve and the pivot check, ending with ``bad`` (positive or NaN: redo densely).
    volts : tuple of tuple of Expr
        (re, im) of each driver's terminal voltage in V, by driver index (the constant 0.0 for a zero part).
    zin : tuple of Expr
        (re, im) of the input impedance in ohm (without the source resistance).
    comment : tuple of str
        Lines describing the reduced network (its edges, unknown nodes and elimination order).
    currents : tuple of tuple of Expr
        (re, im) of the current in A through each part :func:`solver_code` was asked for, in that order.
    """

    prep: tuple[Stmt, ...]
    loads: tuple[Stmt, ...]
    body: tuple[Stmt, ...]
    volts: tuple[tuple[Expr, Expr], ...]
    zin: tuple[Expr, Expr]
    comment: tuple[str, ...]
    currents: tuple[tuple[Expr, Expr], ...] = ()  # (re, im) of the current through each branch asked for, A


@dataclass
class _Build:
    """The state of one generation, passed from step to step of :func:`solver_code`."""

    e: Emitter
    net: Network
    edges: list
    # per edge: ("D", driver) | ("G", name) | ("jwC", name) | ("L0", name) | ("Z", zr, ls, ss, k)
    forms: list = field(default_factory=list)
    ys: list = field(default_factory=list)      # per edge: its admittance (re, im) names
    traps: list = field(default_factory=list)   # names whose NaN/inf marks the point for the dense path
    nodes: list = field(default_factory=list)
    idx: dict = field(default_factory=dict)
    a: dict = field(default_factory=dict)       # the nodal matrix's upper triangle, (i, k) -> (re, im)
    rhs: dict = field(default_factory=dict)
    scale_terms: dict = field(default_factory=dict)
    order: list = field(default_factory=list)
    mags: dict = field(default_factory=dict)
    inv_piv: dict = field(default_factory=dict)
    urow: dict = field(default_factory=dict)
    rhs_at: dict = field(default_factory=dict)
    x: dict = field(default_factory=dict)

    def get(self, i: int, k: int) -> tuple:
        return self.a.get((min(i, k), max(i, k)), (None, None))

    def volt(self, node: str) -> tuple:
        """Node voltage per volt at "in"."""
        if node == GROUND_NODE:
            return (None, None)
        if node == SOURCE_NODE:
            return (Const(1.0), None)
        return self.x[self.idx[node]]


def _edge_constants(b: _Build) -> list[Stmt]:
    """Per candidate: the constants of every edge (values, loss resistances, series sums); sets ``b.forms``."""
    net = b.net
    col_of = {}
    col = 0
    for j, br in enumerate(net.branches):
        if br.kind != "D":
            col_of[j] = col
            col += 1
    prep: list[Stmt] = []
    for j, br in enumerate(net.branches):
        if br.kind == "D":
            continue
        c = col_of[j]
        prep.append(let(f8(f"x_{j}"), VALS[B, c]))
        if br.kind in ("L", "C") and br.r_coef != 0.0:
            prep.append(let(f8(f"r_{j}"), R_COEF[c] * f8(f"x_{j}") ** R_EXP[c] if br.r_exp else R_COEF[c]))
    for ei, edge in enumerate(b.edges):
        brs = [net.branches[j] for j in edge.members]
        if len(brs) == 1 and brs[0].kind == "D":
            b.forms.append(("D", brs[0].driver))
            continue
        if len(brs) == 1 and not brs[0].lossy:
            j = edge.members[0]
            kind = brs[0].kind
            if kind == "R":
                prep.append(let(f8(f"g_{j}"), 1.0 / f8(f"x_{j}")))
                b.forms.append(("G", f8(f"g_{j}")))
            elif kind == "C":
                b.forms.append(("jwC", f8(f"x_{j}")))
            else:
                prep.append(let(f8(f"il_{j}"), 1.0 / f8(f"x_{j}")))
                b.forms.append(("L0", f8(f"il_{j}")))
            continue
        b.forms.append(("Z", *_series_sums(prep, edge, brs, ei), ei))
    return prep


def _series_sums(prep: list[Stmt], edge, brs, ei: int) -> list[Var | None]:
    """The series resistance, inductance and elastance sums of a chain edge, as names (or None)."""
    zr: list[Expr] = []
    ls: list[Expr] = []
    ss: list[Expr] = []
    for j, br in zip(edge.members, brs):
        if br.kind == "R":
            zr.append(f8(f"x_{j}"))
        elif br.kind == "L":
            ls.append(f8(f"x_{j}"))
            if br.r_coef:
                zr.append(f8(f"r_{j}"))
        else:
            ss.append(1.0 / f8(f"x_{j}"))
            if br.r_coef:
                zr.append(f8(f"r_{j}"))
    names: list[Var | None] = []
    for tag, terms in (("zr", zr), ("ls", ls), ("ss", ss)):
        if terms:
            name = f8(f"{tag}_{ei}")
            prep.append(let(name, total(terms)))
            if tag == "zr":
                prep.append(let(f8(f"zr2_{ei}"), name * name))
            names.append(name)
        else:
            names.append(None)
    return names


def _edge_admittances(b: _Build) -> list[Stmt]:
    """Per frequency: the loads of the input arrays and every edge admittance, every division batched into
    one; sets ``b.ys``. Returns the load statements."""
    e = b.e
    w, iw = f8("w"), f8("iw")
    loads: list[Stmt] = [let(w, FIN[0, F]), let(iw, FIN[1, F])]
    pending = []  # (edge index, zr, zi name) needing 1/|z|^2
    for ei, form in enumerate(b.forms):
        if form[0] == "D":
            dd = form[1]
            yr, yi = f8(f"yd{dd}r"), f8(f"yd{dd}i")
            loads += [let(yr, FIN[2 + 2 * dd, F]), let(yi, FIN[3 + 2 * dd, F])]
            b.ys.append((yr, yi))
        elif form[0] == "G":
            b.ys.append((form[1], None))
        elif form[0] == "jwC":
            b.ys.append((None, e.let(w * form[1], "y")))
        elif form[0] == "L0":
            b.ys.append((None, e.let(-iw * form[1], "y")))
        else:
            _, zr, ls, ss, k = form
            parts = ([(1, w * ls)] if ls is not None else []) + ([(-1, iw * ss)] if ss is not None else [])
            zi = e.let(signed_sum(parts), "zi") if parts else None
            if zr is not None and zi is not None:
                den = e.let(f8(f"zr2_{k}") + zi * zi, "zd")
            elif zr is not None:
                den = f8(f"zr2_{k}")
            else:
                assert zi is not None  # a chain edge has a resistance or a reactance
                den = e.let(zi * zi, "zd")
            pending.append((ei, zr, zi, den))
            b.ys.append(None)
    if pending:
        invs = batch_reciprocal(e, [p[3] for p in pending], b.traps, "iz")
        for (ei, zr, zi, _), inv in zip(pending, invs):
            b.ys[ei] = (e.let(zr * inv, "yr") if zr is not None else None,
                        e.let(-zi * inv, "yi") if zi is not None else None)
    return loads


def _assemble(b: _Build) -> set:
    """The symmetric nodal matrix (upper triangle) and the right-hand side for 1 V at "in" (the source
    resistance is applied afterwards, Thevenin-wise), with each node's admittance scale for the pivot check;
    returns the nodes that see a dissipative edge."""
    e, edges, ys, forms = b.e, b.edges, b.ys, b.forms
    b.nodes = sorted({n for ed in edges for n in (ed.a, ed.b)} - {GROUND_NODE, SOURCE_NODE})
    b.idx = idx = {n: i for i, n in enumerate(b.nodes)}
    entries: dict[tuple[int, int], list] = {}
    rhs_terms: dict[int, list] = {}
    b.scale_terms = {i: [] for i in range(len(b.nodes))}
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
                mag_e = e.let(-yi_, "ye")
            else:
                mag_e = e.let(total(([yr_] if yr_ is not None else []) + ([absolute(yi_)] if yi_ is not None else [])),
                              "ye")
        for i in (ia, ib):
            if i is not None:
                entries.setdefault((i, i), []).append((1, ys[ei]))
                b.scale_terms[i].append(mag_e)
                if forms[ei][0] in ("D", "G", "Z"):
                    dissipative.add(b.nodes[i])
        if ia is not None and ib is not None:
            entries.setdefault((min(ia, ib), max(ia, ib)), []).append((-1, ys[ei]))
        if ia is not None and ed.b == SOURCE_NODE:
            rhs_terms.setdefault(ia, []).append(ys[ei])
        if ib is not None and ed.a == SOURCE_NODE:
            rhs_terms.setdefault(ib, []).append(ys[ei])
    for key in sorted(entries):
        b.a[key] = e.sum(entries[key], f"a{key[0]}_{key[1]}_")
    for i, terms in sorted(rhs_terms.items()):
        b.rhs[i] = e.sum([(1, t) for t in terms], f"b{i}_")
    return dissipative


def _eliminate(b: _Build) -> None:
    """Symbolic elimination with fill-in in ``b.order``; the pivots of one elimination-tree level share one
    division (Montgomery's trick)."""
    e, nodes, a, rhs = b.e, b.nodes, b.a, b.rhs
    struct: dict[int, set[int]] = {k: set() for k in range(len(nodes))}
    for (i, k) in a:
        if i != k:
            struct[i].add(k)
            struct[k].add(i)
    level: dict[int, int] = {}
    nbrs_at: dict[int, list[int]] = {}
    left = set(range(len(nodes)))
    for k in b.order:
        left.discard(k)
        nb = sorted(struct[k] & left)
        nbrs_at[k] = nb
        level.setdefault(k, 0)
        for i in nb:
            struct[i] |= set(nb) - {i}
            level[i] = max(level.get(i, 0), level[k] + 1)
    for lv in sorted(set(level.values())):
        group = [k for k in b.order if level[k] == lv]
        dens = []
        for k in group:
            pr, pi = b.get(k, k)
            if pr is not None and pi is not None:
                b.mags[k] = e.let(pr * pr + pi * pi, f"q{k}_m")
            elif pr is not None or pi is not None:
                p = pr if pr is not None else pi
                b.mags[k] = e.let(p * p, f"q{k}_m")
            else:
                raise NetworkError("internal: a structurally zero pivot")
            dens.append(b.mags[k])
        invs = batch_reciprocal(e, dens, b.traps, f"ip{lv}_")
        for k, inv in zip(group, invs):
            pr, pi = b.get(k, k)
            b.inv_piv[k] = (e.let(pr * inv, f"q{k}_r") if pr is not None else None,
                            e.let(-pi * inv, f"q{k}_i") if pi is not None else None)
        for k in group:
            nb = nbrs_at[k]
            b.urow[k] = {i: b.get(k, i) for i in nb}
            b.rhs_at[k] = rhs.get(k, (None, None))
            t = {i: e.mul(b.get(k, i), b.inv_piv[k], f"l{k}_{i}_") for i in nb}
            for ii, i in enumerate(nb):
                for jj in nb[ii:]:
                    key = (min(i, jj), max(i, jj))
                    a[key] = e.fms(a.get(key, (None, None)), t[i], b.get(k, jj), f"a{key[0]}_{key[1]}_")
                if b.rhs_at[k] != (None, None):
                    rhs[i] = e.fms(rhs.get(i, (None, None)), t[i], b.rhs_at[k], f"b{i}_")


def _back_substitute(b: _Build, currents: tuple[int, ...], edge_of: dict) -> None:
    """Back substitution, only for the node voltages the outputs need; sets ``b.x``."""
    e = b.e
    need: set[int] = set()
    for ei, (ed, form) in enumerate(zip(b.edges, b.forms)):
        if form[0] == "D" or SOURCE_NODE in (ed.a, ed.b) or any(edge_of.get(j) == ei for j in currents):
            need.update(b.idx[n] for n in (ed.a, ed.b) if n in b.idx)
    for k in b.order:
        if k in need:
            need.update(b.urow[k])
    for k in reversed(b.order):
        if k not in need:
            continue
        acc = b.rhs_at[k]
        for i, u in b.urow[k].items():
            acc = e.fms(acc, u, b.x[i], f"s{k}_")
        b.x[k] = e.mul(acc, b.inv_piv[k], f"x{k}_") if acc != (None, None) else (None, None)


def _source_scale(b: _Build) -> tuple[tuple, tuple]:
    """The current drawn at 1 V, the input impedance, and the source applied through Rs:
    Z = 1 / I1;  V(in) = vs / (1 + Rs I1);  every node voltage scales by V(in). Returns (zin, scale)."""
    e = b.e
    cur_terms = []
    for ei, ed in enumerate(b.edges):
        if SOURCE_NODE in (ed.a, ed.b):
            other = ed.b if ed.a == SOURCE_NODE else ed.a
            dv = e.sum([(1, b.volt(SOURCE_NODE)), (-1, b.volt(other))], f"dv{ei}_")
            cur_terms.append(e.mul(b.ys[ei], dv, f"c{ei}_"))
    cr, ci = e.sum([(1, c) for c in cur_terms], "ci_")
    if cr is None and ci is None:
        raise NetworkError("internal: no current path from the source")
    cm = e.let(total([p * p for p in (cr, ci) if p is not None]), "cm")
    if b.net.source_resistance > 0.0:
        sr = e.let(1.0 + RS * cr if cr is not None else Const(1.0), "sd")
        si = e.let(RS * ci, "sd") if ci is not None else None
        sm = e.let(sr * sr + si * si if si is not None else sr * sr, "sm")
        inv_c, inv_s = batch_reciprocal(e, [cm, sm], b.traps, "iv")
        scale = (e.let(VS * sr * inv_s, "vr"), e.let(-VS * si * inv_s, "vi") if si is not None else None)
    else:
        inv_c = e.let(1.0 / cm, "cn")
        b.traps.append(e.let(cm * inv_c, "cnt"))
        scale = (VS, None)
    zin = (e.let(cr * inv_c, "zr") if cr is not None else None, e.let(-ci * inv_c, "zi") if ci is not None else None)
    return zin, scale


def _pivot_checks(b: _Build, trap_terms: list[Expr]) -> list[Stmt]:
    """Pivot checks: |p|^2 >= tau2 (sum |y| at the node)^2, and a NaN trap over everything produced."""
    check: list[Stmt] = []
    margins = []
    bad = f8("bad")
    for k in b.order:
        sc = f8(f"sc{k}")
        check.append(let(sc, total(b.scale_terms[k]) if b.scale_terms[k] else Const(0.0)))
        margins.append(TAU2 * sc * sc - b.mags[k])
    if margins:
        check.append(let(bad, margins[0]))
        check += [assign(bad, maximum(bad, m)) for m in margins[1:]]
    else:
        check.append(let(bad, -1.0))
    check.append(assign(bad, bad + 0.0 * total(trap_terms)))
    return check


def solver_code(net: Network, currents: tuple[int, ...] = ()) -> SolverCode:
    """Generate the solver's straight-line code for ``net`` (the kernel around it: :func:`generate_kernel`).

    ``currents``: indices into ``net.branches`` of valued parts whose current (at the source voltage ``vs``)
    the code also computes: the current of the edge (part or series chain) that holds the part. Returns a
    :class:`SolverCode` in the names of the module-level arrays and scalars (:data:`VALS`, :data:`FIN`, ...)
    and loop indices (:data:`B`, :data:`F`). Raises NetworkError for what should not happen: a structurally
    zero pivot, no current path from the source, a part in ``currents`` that carries none (a closed loop).
    """
    b = _Build(e=Emitter(), net=net, edges=reduce_series_chains(net))
    e, edges, forms = b.e, b.edges, b.forms
    prep = _edge_constants(b)
    loads = _edge_admittances(b)
    body_y = e.lines
    e.lines = []
    dissipative = _assemble(b)
    adj: dict[str, set[str]] = {n: set() for n in b.nodes}
    for (i, k) in b.a:
        if i != k:
            adj[b.nodes[i]].add(b.nodes[k])
            adj[b.nodes[k]].add(b.nodes[i])
    b.order = [b.idx[n] for n in elimination_order(b.nodes, adj, {b.nodes[i] for i in b.rhs}, dissipative)]
    _eliminate(b)
    edge_of = {j: ei for ei, ed in enumerate(edges) for j in ed.members}
    _back_substitute(b, currents, edge_of)
    zin, scale = _source_scale(b)
    trap_terms = list(b.traps)
    volts: dict[int, tuple[Expr, Expr]] = {}
    for ed, form in zip(edges, forms):
        if form[0] == "D":
            u = e.sum([(1, b.volt(ed.a)), (-1, b.volt(ed.b))], f"u{form[1]}_")
            v = e.mul(u, scale, f"v{form[1]}_")
            volts[form[1]] = (_or_zero(v[0]), _or_zero(v[1]))
            trap_terms.extend(x for x in v if x is not None)
    trap_terms.extend(x for x in zin if x is not None)
    amps = []
    for j in currents:
        if j not in edge_of:
            raise NetworkError(f"internal: part {net.branches[j].name} carries no current (a closed loop)")
        ed = edges[edge_of[j]]
        u = e.sum([(1, b.volt(ed.a)), (-1, b.volt(ed.b))], f"ub{j}_")
        i_ = e.mul(e.mul(b.ys[edge_of[j]], u, f"ib{j}_"), scale, f"ia{j}_")
        amps.append((_or_zero(i_[0]), _or_zero(i_[1])))
    body_solve = e.lines
    e.lines = []
    check = _pivot_checks(b, trap_terms)
    nodes, order = b.nodes, b.order
    return SolverCode(
        prep=tuple(prep), loads=tuple(loads), body=tuple(body_y + body_solve + check),
        volts=tuple(volts[i] for i in range(len(net.driver_names))), zin=(_or_zero(zin[0]), _or_zero(zin[1])),
        currents=tuple(amps),
        comment=(f"edges: {[(ed.a, ed.b, [net.branches[j].name for j in ed.members]) for ed in edges]}",
                 f"unknown nodes {nodes}; elimination order {[nodes[k] for k in order]}"))


def _or_zero(x: Expr | None) -> Expr:
    return Const(0.0) if x is None else x


def generate_kernel(net: Network) -> Kernel:
    """The kernel that solves ``net`` for a batch of values on its grid, as IR.

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

    Parameters
    ----------
    net : Network
        The netlist on its grid.

    Returns
    -------
    Kernel
        The checked kernel ``kernel`` (:class:`~xo_fit.solver.ir_kernel.Kernel`), for
        :func:`~xo_fit.solver.kernels.load_kernel`. Its arrays: ``vals`` in SI (ohm, H, F), ``r_coef`` and
        ``r_exp`` as :class:`~xo_fit.solver.netlist.Branch` has them, ``fin`` as :func:`kernel_inputs` gives it
        (K = 2 + 2 D); ``vs`` in V, ``rs`` in ohm, ``tau2`` dimensionless; the outputs in V and ohm.
    """
    code = solver_code(net)
    d = len(net.driver_names)
    scratch, out, out_bad = Array("scratch", 2), Array("out", 3), Array("out_bad", 2)
    nb, nf, nbad, bv = i8("nb"), i8("nf"), i8("nbad"), f8("bv")
    outs: list[Stmt] = []
    for i, (vr, vi) in enumerate(code.volts):
        outs += [scratch.store((2 * i, F), vr), scratch.store((2 * i + 1, F), vi)]
    outs += [scratch.store((2 * d, F), code.zin[0]), scratch.store((2 * d + 1, F), code.zin[1]),
             scratch.store((2 * d + 2, F), f8("bad"))]
    interleave: list[Stmt] = []
    for i in range(d + 1):  # into the complex result seen as float64 (B, D + 1, 2 F): 6 % faster than complex()
        interleave += [out.store((B, i, 2 * F), scratch[2 * i, F]),
                       out.store((B, i, 2 * F + 1), scratch[2 * i + 1, F])]
    interleave += [let(bv, scratch[2 * d + 2, F]), out_bad.store((B, F), bv), when(Not(bv <= 0.0), [update(nbad, 1)])]
    per_b = [*code.prep, loop(F, None, nf, [*code.loads, *code.body, *outs]), loop(F, None, nf, interleave)]
    body = [let(nb, VALS.shape(0)), let(nf, FIN.shape(1)), let(nbad, 0), loop(B, None, nb, per_b), Return(nbad)]
    fn = Function("kernel", (VALS, R_COEF, R_EXP, FIN, VS, RS, TAU2, scratch, out, out_bad), tuple(body))
    return Kernel(fn, comments=("generated by xo_fit.solver.codegen.generate_kernel; do not edit",
                                f"kernel version {KERNEL_VERSION}", *code.comment))


def generate_kernel_source(net: Network) -> str:
    """The Python text numba compiles of :func:`generate_kernel` (a module defining ``kernel`` under
    ``@numba.njit``: :func:`xo_fit.solver.ir_python.text`)."""
    return python_text(generate_kernel(net))
