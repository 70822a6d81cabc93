"""The frequency grid every curve lives on, and the helpers that select parts of it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Grid:
    """The log-spaced frequency axis every curve is put on; the defaults are ``[grid]``'s.

    Attributes
    ----------
    f_min : float
        The lowest frequency, in Hz.
    f_max : float
        The highest frequency, in Hz (above ``f_min``).
    points : int
        The number of points F (dimensionless), at least 2.
    """

    f_min: float = 20.0
    f_max: float = 20000.0
    points: int = 320

    @property
    def frequencies(self) -> np.ndarray:
        """Frequencies in Hz, shape (F,), strictly rising, log-spaced, read-only."""
        f = np.geomspace(self.f_min, self.f_max, self.points)
        f.setflags(write=False)
        return f


def band_mask(frequencies: np.ndarray, band: tuple[float, float] | None) -> np.ndarray:
    """The grid points inside a band.

    A band that holds no grid point selects the point nearest its geometric centre.

    Parameters
    ----------
    frequencies : ndarray
        The grid, in Hz, shape (F,).
    band : tuple of float or None
        (low, high) in Hz, inclusive; None selects every point.

    Returns
    -------
    ndarray
        A boolean mask, shape (F,).
    """
    if band is None:
        return np.ones(frequencies.shape, dtype=bool)
    mask = (frequencies >= band[0]) & (frequencies <= band[1])
    if not mask.any():
        mask[np.argmin(np.abs(np.log(frequencies / np.sqrt(band[0] * band[1]))))] = True
    return mask
