"""The frequency grid every curve lives on, and the helpers that select parts of it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Grid:
    """The log-spaced frequency axis every curve is put on (Hz); the defaults are ``[grid]``'s."""

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
    """Boolean mask (F,) of the grid points inside ``band`` (Hz, inclusive); all points when band is None.

    A band that holds no grid point selects the point nearest its geometric centre.
    """
    if band is None:
        return np.ones(frequencies.shape, dtype=bool)
    mask = (frequencies >= band[0]) & (frequencies <= band[1])
    if not mask.any():
        mask[np.argmin(np.abs(np.log(frequencies / np.sqrt(band[0] * band[1]))))] = True
    return mask
