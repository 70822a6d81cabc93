"""The dense reference solve: plain nodal analysis with LAPACK's pivoting solve of the full matrix.

Slow and exact: every fast path is tested against it, the compiled kernel
hands it the points it flags, and single reported designs are scored on it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from xo_fit.constants import GROUND_NODE, SOURCE_NODE
from xo_fit.solver.netlist import Solution

if TYPE_CHECKING:
    from xo_fit.solver.network import Network


def branch_admittances(net: Network, values: np.ndarray, f_index: np.ndarray) -> np.ndarray:
    """Admittance of every branch at M (values row, frequency) points.

    Parameters
    ----------
    net : Network
        The netlist on its grid.
    values : ndarray
        Part values in SI (ohm, H, F), one row per point, shape (M, P).
    f_index : ndarray
        Each point's index into the grid, integers, shape (M,).

    Returns
    -------
    ndarray
        Each branch's admittance, complex, in S (siemens), shape (M, N), N = len(net.branches), in branch
        order.
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
    x = _solve_points(mat, rhs, np.abs(y).max(axis=-1)) if n else np.zeros((m, 0), dtype=complex)

    def volt(node: str) -> np.ndarray:
        if node in fixed:
            return np.full(m, fixed[node], dtype=complex)
        return x[:, idx[node]]

    return volt, y


def _solve_points(mat: np.ndarray, rhs: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Solve (M, N, N) x = (M, N) for every point.

    A point whose matrix is exactly singular (an ideal series resonance that leaves a node with no admittance
    at all: the limit of a vanishing resistance) is solved with the diagonal raised by 1e-13 of the largest
    branch admittance there (``scale``, (M,) siemens), which gives that limit to within rounding and matches the
    compiled kernel, which meets the same point through the merged series chain; a point that stays unsolvable gets
    NaN (the design then scores as infeasible).
    """
    with np.errstate(all="ignore"):
        try:
            x = np.linalg.solve(mat, rhs[..., None])[..., 0]
        except np.linalg.LinAlgError:
            x = np.full(rhs.shape, np.nan, dtype=complex)
            for i in range(mat.shape[0]):
                try:
                    x[i] = np.linalg.solve(mat[i], rhs[i])
                except np.linalg.LinAlgError:
                    continue
        eye = np.eye(mat.shape[-1])
        for i in np.nonzero(~np.all(np.isfinite(x), axis=-1))[0]:  # singular, or so nearly that it overflowed
            try:
                x[i] = np.linalg.solve(mat[i] + 1e-13 * max(scale[i], 1e-300) * eye, rhs[i])
            except np.linalg.LinAlgError:
                x[i] = np.nan
        return x


def solve_dense(net: Network, values: np.ndarray, f_index: np.ndarray) -> Solution:
    """Plain nodal analysis with LAPACK's pivoting solve, for M (values row, frequency index) pairs.

    Parameters
    ----------
    net : Network
        The netlist on its grid.
    values : ndarray
        Part values in SI (ohm, H, F), one row per point, shape (M, P).
    f_index : ndarray
        Each point's index into the grid, integers, shape (M,).

    Returns
    -------
    Solution
        With the F axis dropped: each driver's terminal voltage in V, shape (M, D), and the input impedance
        (without the source resistance) in ohm, shape (M,), complex, for the source at ``net.source_voltage``.
        A point that stays singular gives NaN.
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


def branch_states(net: Network, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Voltage across and current through every branch of one design, from the dense solve.

    Parameters
    ----------
    net : Network
        The netlist on its grid.
    values : ndarray
        The design's part values in SI (ohm, H, F), shape (P,) (of a (B, P) batch only the first row is used).

    Returns
    -------
    voltage : ndarray
        Each branch's voltage V(a) - V(b), complex, in V, shape (N, F), N = len(net.branches).
    current : ndarray
        Each branch's current, flowing a -> b through it, complex, in A, shape (N, F); both for the source
        at ``net.source_voltage``.
    """
    v = net.checked_values(values)[:1]
    f_index = np.arange(net.frequencies.size)
    volt, y = _dense_nodes(net, np.repeat(v, f_index.size, axis=0), f_index)
    volts = np.stack([volt(br.a) - volt(br.b) for br in net.branches])
    return volts, volts * y.T


def branch_currents(net: Network, values: np.ndarray) -> np.ndarray:
    """Current through every branch for a batch of designs, from the dense solve (the reference the fused
    kernel's stress term is held to).

    Parameters
    ----------
    net : Network
        The netlist on its grid.
    values : ndarray
        Part values in SI (ohm, H, F), shape (B, P) or (P,).

    Returns
    -------
    ndarray
        Each branch's current a -> b for the source at ``net.source_voltage``, complex, in A, shape
        (B, N, F), N = len(net.branches).
    """
    v = net.checked_values(values)
    b, nf = v.shape[0], net.frequencies.size
    bi, fi = np.meshgrid(np.arange(b), np.arange(nf), indexing="ij")
    volt, y = _dense_nodes(net, v[bi.ravel()], fi.ravel())
    amps = np.stack([(volt(br.a) - volt(br.b)) * y[:, j] for j, br in enumerate(net.branches)], axis=-1)
    return amps.reshape(b, nf, -1).transpose(0, 2, 1)
