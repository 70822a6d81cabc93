"""The crossover netlist: compiled once, then solved for whole batches of part values.

A network is a set of two-terminal parts between named nodes. Node ``"in"`` is
the source's positive terminal and ``"0"`` its return; the source has a
voltage ``Vs`` and a series resistance ``Rs``. Each part is a series branch:

* R: Z = R;
* L: Z = r + j w L, with r its DC resistance (fixed ohms, or the wire law
  r = a L^0.6 of :mod:`xo_fit.physics.coils`, so a coil moved by the search keeps its
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

from dataclasses import dataclass, field

import numpy as np

from xo_fit.constants import GROUND_NODE, PIVOT_TOLERANCE, SOURCE_NODE
from xo_fit.errors import NetworkError
from xo_fit.solver.codegen import generate_kernel, kernel_inputs
from xo_fit.solver.dense import solve_dense
from xo_fit.solver.kernels import load_kernel
from xo_fit.solver.netlist import Branch, Solution, check_topology

__all__ = ["Branch", "Network", "Solution", "compile_network"]


def compile_network(branches: list[Branch], driver_names: list[str], frequencies: np.ndarray,
                    driver_impedance: np.ndarray, source_voltage: float, source_resistance: float,
                    *, context: str | None = None) -> Network:
    """Check a netlist and build its solver.

    Parameters
    ----------
    branches : list of Branch
        Every part; the valued ones (R, L, C) in the order of the values' columns P.
    driver_names : list of str
        The names along the driver axis D; each driver is wired in by exactly one "D" branch.
    frequencies : ndarray
        The grid, in Hz, shape (F,), strictly rising, above 0.
    driver_impedance : ndarray
        Each driver's impedance on the grid, complex, in ohm, shape (D, F).
    source_voltage : float
        The source's open-circuit voltage, in V.
    source_resistance : float
        The source's series resistance, in ohm, zero or more.
    context : str or None
        Where the netlist comes from (the job file), for the messages.

    Returns
    -------
    Network
        The checked netlist on the grid; its kernel is generated on the first solve.

    Raises
    ------
    NetworkError
        A topology :func:`~xo_fit.solver.netlist.check_topology` refuses, a driver not wired in exactly once,
        a grid that is not strictly rising above 0 Hz, a driver impedance that is not finite, is zero or has a
        negative real part, a negative source resistance.
    ValueError
        ``driver_impedance`` of another shape than (D, F).
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
    """A compiled netlist on a fixed grid. Picklable: the kernel is rebuilt (from the disk cache) on demand.

    Made by :func:`compile_network`, which checks its arguments.

    Parameters
    ----------
    branches : tuple of Branch
        Every part; the valued ones in the order of the values' columns P.
    driver_names : tuple of str
        The names along the driver axis D.
    frequencies : ndarray
        The grid, in Hz, shape (F,).
    driver_impedance : ndarray
        Each driver's impedance, complex, in ohm, shape (D, F).
    source_voltage : float
        The source's open-circuit voltage, in V.
    source_resistance : float
        The source's series resistance, in ohm.
    """

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
        """The grid's angular frequencies 2 pi f, in rad/s, shape (F,)."""
        return 2 * np.pi * self.frequencies

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        state["_kernel"] = None
        state.pop("_args", None)
        return state

    # --- solving -----------------------------------------------------------------------------

    def checked_values(self, values: np.ndarray) -> np.ndarray:
        """Part values as the solvers take them: (B, P) C-contiguous floats from (B, P) or (P,), SI (ohm, H, F);
        ValueError on another shape, a non-finite value or one not above zero."""
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
        values : ndarray
            The value of every R (ohm), L (H) and C (F) in the order of :attr:`valued`, shape (B, P), or (P,)
            for one set (then B = 1).

        Returns
        -------
        Solution
            ``voltages`` complex in V, shape (B, D, F), and ``impedance`` complex in ohm, shape (B, F) (views
            into one array).

        Raises
        ------
        ValueError
            Values of another shape, or not all finite and above zero.
        """
        return self.solve_compiled(values)

    def solve_compiled(self, values: np.ndarray) -> Solution:
        """:meth:`solve` through the generated kernel whatever the batch size (flagged points densely).

        Parameters
        ----------
        values : ndarray
            Part values in SI (ohm, H, F), shape (B, P) or (P,).

        Returns
        -------
        Solution
            Driver voltages in V, shape (B, D, F), and input impedance in ohm, shape (B, F), complex.
        """
        v = self.checked_values(values)
        kernel = self.kernel()
        k = self.kernel_args()
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
        """The same as :meth:`solve` through a dense pivoting solve of the full nodal matrix (slow, exact).

        Parameters
        ----------
        values : ndarray
            Part values in SI (ohm, H, F), shape (B, P) or (P,).

        Returns
        -------
        Solution
            Driver voltages in V, shape (B, D, F), and input impedance in ohm, shape (B, F), complex.
        """
        v = self.checked_values(values)
        bsz, nf = v.shape[0], self.frequencies.size
        bi, fi = np.meshgrid(np.arange(bsz), np.arange(nf), indexing="ij")
        sol = solve_dense(self, v[bi.ravel()], fi.ravel())
        return Solution(voltages=sol.voltages.reshape(bsz, nf, -1).transpose(0, 2, 1),
                        impedance=sol.impedance.reshape(bsz, nf))

    def kernel_args(self) -> dict:
        """The generated kernel's per-topology inputs, built once: ``r_coef`` and ``r_exp`` (P,) of each valued
        branch's series resistance law, and ``fin``, the frequency-dependent rows (:func:`kernel_inputs`)."""
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
        """The compiled kernel for this topology (generated, compiled and cached on first use).

        Returns
        -------
        callable
            The kernel of :func:`~xo_fit.solver.codegen.generate_kernel` (its signature there), as
            :func:`~xo_fit.solver.kernels.load_kernel` gives it.
        """
        if self._kernel is None:
            self._kernel = load_kernel(generate_kernel(self))
        return self._kernel

    def series_resistance(self, values: np.ndarray) -> np.ndarray:
        """The series resistance r of every valued branch (DCR of coils, ESR of capacitors; 0 for an R).

        Parameters
        ----------
        values : ndarray
            Part values in SI (ohm, H, F), shape (B, P) or (P,).

        Returns
        -------
        ndarray
            r in ohm, the shape of ``values``: (B, P) or (P,).
        """
        k = self.kernel_args()
        return k["r_coef"] * np.asarray(values, dtype=float) ** k["r_exp"]
