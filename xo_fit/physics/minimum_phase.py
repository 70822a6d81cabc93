"""Minimum phase from a magnitude curve: Bode's gain-phase integral, evaluated exactly for a piecewise-linear
log magnitude, with the data continued at both ends by its edge slopes."""

from __future__ import annotations


import numpy as np


#: Width of the band at each end of a curve whose log-log slope extends it (octaves).
EDGE_OCTAVES = 1.0 / 3.0


#: Resolution at which magnitude is resampled for the minimum-phase integral (points per octave).
MINPHASE_PER_OCTAVE = 96


def edge_slope(u: np.ndarray, a: np.ndarray, at_start: bool) -> float:
    """Least-squares slope of a(u) over the outer EDGE_OCTAVES of the data at one end."""
    width = EDGE_OCTAVES * np.log(2.0)
    sel = (u <= u[0] + width) if at_start else (u >= u[-1] - width)
    if np.count_nonzero(sel) < 2:
        sel = slice(0, 2) if at_start else slice(-2, None)
    us, as_ = u[sel], a[sel]
    du = us - us.mean()
    den = float(np.dot(du, du))
    return float(np.dot(du, as_ - as_.mean()) / den) if den > 0 else 0.0


def _bode_kernel(u: np.ndarray) -> np.ndarray:
    """K(u) = integral from 0 to u of ln coth(|t|/2) dt, an odd function with K(+-inf) = +-pi^2/4.

    K(u) = sign(u) (pi^2/4 - 2 chi_2(e^-|u|)) with Legendre's chi
    chi_2(x) = (Li2(x) - Li2(-x)) / 2, and Li2(z) = spence(1 - z) in scipy.
    """
    from scipy.special import spence  # imported here: 0.16 s, needed only for minimum phase

    x = np.exp(-np.abs(u))
    chi2 = 0.5 * (spence(1.0 - x) - spence(1.0 + x))
    return np.sign(u) * (np.pi**2 / 4.0 - 2.0 * chi2)


def minimum_phase(frequency: np.ndarray, magnitude_db_: np.ndarray, at: np.ndarray) -> np.ndarray:
    """Minimum phase in radians at frequencies ``at`` of a magnitude known at ``frequency``.

    Bode's gain-phase relation (H. W. Bode, Network Analysis and Feedback
    Amplifier Design, 1945, ch. 14): with A = ln|H| and u = ln(w / w0),

        phi(w0) = (1/pi) * integral of (dA/du) ln coth(|u|/2) du,

    i.e. minus the Hilbert transform of ln|H|. The magnitude is resampled at
    MINPHASE_PER_OCTAVE points per octave, taken as piecewise linear in u, and
    extended beyond both ends by its own edge slopes (fitted over the outer
    EDGE_OCTAVES); for that piecewise-linear A the integral is evaluated exactly
    through the antiderivative of the kernel, so the only error is the
    interpolation of the data and the slope extension.

    Parameters
    ----------
    frequency : ndarray
        Frequencies in Hz, shape (N,), strictly rising.
    magnitude_db_ : ndarray
        The magnitude in dB, shape (N,).
    at : ndarray
        Frequencies in Hz, shape (M,).

    Returns
    -------
    ndarray
        The phase in rad, shape (M,). A rising magnitude slope of 6.02 dB/octave
        everywhere gives +pi/2.
    """
    logf = np.log(np.asarray(frequency, dtype=float))
    n = max(int(np.ceil((logf[-1] - logf[0]) / np.log(2.0) * MINPHASE_PER_OCTAVE)) + 1, 2)
    u_nodes = np.linspace(logf[0], logf[-1], n)
    a = np.interp(u_nodes, logf, np.asarray(magnitude_db_, dtype=float)) * (np.log(10.0) / 20.0)  # nepers
    s_lo = edge_slope(u_nodes, a, True)
    s_hi = edge_slope(u_nodes, a, False)
    slopes = np.diff(a) / np.diff(u_nodes)
    # slope change at each node: s_{j-1} - s_j, with s_lo before the first and s_hi after the last
    before = np.concatenate(([s_lo], slopes))
    after = np.concatenate((slopes, [s_hi]))
    jump = before - after
    at = np.asarray(at, dtype=float)
    lat = np.log(at)
    if at.size * n <= KERNEL_CELLS or at.size <= FINE * n:
        acc = _kernel_sum(u_nodes, jump, lat, at)
    else:
        # a grid finer than the data's own resolution (MINPHASE_PER_OCTAVE): the phase at FINE points per node
        # interval, interpolated in log frequency (the magnitude is piecewise linear between nodes anyway: the
        # phase differs from the exact sum by at most 0.03 deg on the demo woofer at 50,000 points); beyond the
        # nodes, exactly
        inside = (lat >= u_nodes[0]) & (lat <= u_nodes[-1])
        fine = np.linspace(u_nodes[0], u_nodes[-1], FINE * (n - 1) + 1)
        acc = np.empty(at.size)
        acc[inside] = np.interp(lat[inside], fine, _kernel_sum(u_nodes, jump, fine, np.exp(fine)))
        if not inside.all():
            acc[~inside] = _kernel_sum(u_nodes, jump, lat[~inside], at[~inside])
    return ((s_lo + s_hi) * np.pi**2 / 4.0 + acc) / np.pi


def _kernel_sum(u_nodes: np.ndarray, jump: np.ndarray, lat: np.ndarray, at: np.ndarray) -> np.ndarray:
    """The Bode kernel (M, n) at log frequencies ``lat`` (M,) times the slope jumps (n,): (M,). A kernel of at most
    KERNEL_CELLS is computed whole and kept for the next file of the same range; a larger one in blocks of rows."""
    n = u_nodes.size
    if lat.size * n > KERNEL_CELLS:
        rows = max(1, KERNEL_CELLS // n)
        acc = np.empty(lat.size)
        for i in range(0, lat.size, rows):
            acc[i:i + rows] = _bode_kernel(u_nodes[None, :] - lat[i:i + rows, None]) @ jump
        return acc
    key = (float(u_nodes[0]), float(u_nodes[-1]), n, at.tobytes())
    kernel = _KERNELS.get(key)
    if kernel is None:  # the same for every file of one range on one grid (a driver's off-axis set): kept
        kernel = _bode_kernel(u_nodes[None, :] - np.log(at)[:, None])
        if len(_KERNELS) >= _KERNEL_CACHE:
            _KERNELS.pop(next(iter(_KERNELS)))
        _KERNELS[key] = kernel
    return kernel @ jump


#: The largest Bode kernel (grid points x nodes) computed whole and kept, 8 M cells (64 MiB): a grid of up to
#: 8,000 points for a 20 Hz - 20 kHz file; beyond, the grid is finer than the nodes and the phase is
#: interpolated (see FINE); memory stays under about 6 x 64 MiB for a grid of any size.
KERNEL_CELLS = 8_000_000
#: On a grid finer than the nodes, the phase is computed exactly at this many points per node interval.
FINE = 4
#: Bode kernels (M, n) by (first node, last node, n, grid): a few, for the files of one job.
_KERNELS: dict = {}


_KERNEL_CACHE = 8
