"""Figures of merit of a simulated design (the fit's cost terms join them in cost.py's later sections).

Metrics, in the words a designer uses:

* ``impedance_min_ohm`` / ``impedance_min_hz``: the lowest magnitude of the
  load the amplifier sees (the network's input impedance, not counting the
  source's own resistance) within the target band (the whole grid when the job
  has no band), and the frequency where it occurs.
"""

from __future__ import annotations

import numpy as np


def band_mask(frequencies: np.ndarray, band: tuple[float, float] | None) -> np.ndarray:
    """Boolean mask (F,) of the grid points inside ``band`` (Hz, inclusive); all points when band is None."""
    if band is None:
        return np.ones(frequencies.shape, dtype=bool)
    mask = (frequencies >= band[0]) & (frequencies <= band[1])
    if not mask.any():
        # a band narrower than the grid spacing: take the nearest point
        mask[np.argmin(np.abs(np.log(frequencies / np.sqrt(band[0] * band[1]))))] = True
    return mask


def impedance_minimum(frequencies: np.ndarray, impedance: np.ndarray,
                      band: tuple[float, float] | None) -> tuple[np.ndarray, np.ndarray]:
    """Minimum |Z| (ohm) and its frequency (Hz) over the band; impedance (..., F) -> two arrays (...)."""
    mask = band_mask(frequencies, band)
    mag = np.abs(impedance[..., mask])
    i = np.argmin(mag, axis=-1)
    return np.take_along_axis(mag, i[..., None], axis=-1)[..., 0], frequencies[mask][i]


def simulation_metrics(system, sim) -> dict:
    """Metrics of the first design of a Simulation, as plain floats for result.json."""
    zmin, fmin = impedance_minimum(system.frequencies, sim.impedance[0], system.job.target.band)
    return {"impedance_min_ohm": float(zmin), "impedance_min_hz": float(fmin)}
