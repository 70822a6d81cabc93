"""From driver terminal voltages to sound pressure: offsets, polarity, summation.

Each driver's pressure in the network is

    p_d(f) = H_d(f) * V_d(f) / V_ref,d * exp(-j w offset_d / c)

with H_d its measured response (complex Pa at the reference voltage V_ref,d),
V_d the voltage across its terminals (positive node first, so a driver wired
"0" first is inverted by the network itself), offset_d its acoustic centre
behind the reference plane (m) and c the speed of sound. The system output is
the complex sum over drivers. Pressures stay complex; dB appears only at the
edges (:func:`spl_db`).
"""

from __future__ import annotations

import numpy as np

from .constants import P_REF, SPL_FLOOR_DB


def driver_factors(response: np.ndarray, reference_voltage: np.ndarray, offset: np.ndarray,
                   frequencies: np.ndarray, speed_of_sound: float) -> np.ndarray:
    """Per-volt complex pressure of each driver including its offset delay, Pa/V, shape (D, F).

    response: complex Pa at the reference voltage, (D, F); reference_voltage: V, (D,);
    offset: m, (D,); frequencies: Hz, (F,).
    """
    w = 2 * np.pi * np.asarray(frequencies)
    delay = np.exp(-1j * w[None, :] * np.asarray(offset)[:, None] / speed_of_sound)
    return response / np.asarray(reference_voltage)[:, None] * delay


def pressures(voltages: np.ndarray, factors: np.ndarray) -> np.ndarray:
    """Each driver's pressure in Pa, (B, D, F), from terminal voltages (B, D, F) and factors (D, F)."""
    return voltages * factors


def total(pressure: np.ndarray) -> np.ndarray:
    """Complex sum over the driver axis: (..., D, F) -> (..., F), Pa."""
    return pressure.sum(axis=-2)


def spl_db(pressure: np.ndarray) -> np.ndarray:
    """Sound pressure level in dB SPL re 20 uPa; levels below SPL_FLOOR_DB are clipped to it."""
    mag = np.abs(pressure)
    with np.errstate(divide="ignore"):
        db = 20.0 * np.log10(mag / P_REF)
    return np.maximum(db, SPL_FLOOR_DB)


def phase_deg(x: np.ndarray) -> np.ndarray:
    """Phase in degrees, wrapped to (-180, 180]."""
    return np.rad2deg(np.angle(x))
