"""The tables of a design's CSV files (response.csv, directivity.csv, angles.csv): complex curves to dB columns."""

from __future__ import annotations

import numpy as np

from xo_fit.io.results import Table
from xo_fit.model import acoustics


def response_table(frequencies: np.ndarray, driver_names: tuple[str, ...], pressure: np.ndarray,
                   total: np.ndarray, impedance: np.ndarray, target_db: np.ndarray | None = None) -> Table:
    """response.csv, columns per the contract.

    pressure: complex Pa (D, F); total: complex Pa (F,); impedance: complex ohm (F,);
    target_db: dB SPL (F,) or None (the column is then empty).
    """
    cols: dict[str, np.ndarray] = {"frequency_hz": frequencies}
    for name, p in zip(driver_names, pressure):
        cols[f"{name}_db"] = acoustics.spl_db(p)
        cols[f"{name}_deg"] = acoustics.phase_deg(p)
    cols["sum_db"] = acoustics.spl_db(total)
    cols["sum_deg"] = acoustics.phase_deg(total)
    cols["target_db"] = target_db if target_db is not None else np.full(frequencies.size, np.nan)
    cols["impedance_ohm"] = np.abs(impedance)
    cols["impedance_deg"] = acoustics.phase_deg(impedance)
    return Table(cols)


def directivity_table(frequencies: np.ndarray, curves: dict[str, np.ndarray]) -> Table:
    """directivity.csv: frequency_hz, then each ANSI/CTA-2034-A curve in dB SPL (``curves``: mean squared
    pressure, Pa^2 (F,), by name), and the two directivity indices; a curve whose positions were not all
    measured is left out (and a DI that needs it)."""
    cols: dict[str, np.ndarray] = {"frequency_hz": frequencies}
    for name in acoustics.CURVES:
        if name in curves:
            cols[f"{name}_db"] = acoustics.power_db(curves[name])
    for di, other in (("sound_power_di_db", "sound_power_db"), ("early_reflections_di_db", "early_reflections_db")):
        if "listening_window_db" in cols and other in cols:
            cols[di] = cols["listening_window_db"] - cols[other]
    return Table(cols)


def angles_table(frequencies: np.ndarray, positions: tuple, pressure: np.ndarray) -> Table:
    """angles.csv: frequency_hz, then the summed level (dB SPL) at every position, ``h<angle>_db`` then
    ``v<angle>_db`` by angle (the axis is h0, the rear h180). pressure: complex Pa (A, F) at ``positions``."""
    cols: dict[str, np.ndarray] = {"frequency_hz": frequencies}
    order = sorted(range(len(positions)), key=lambda i: (positions[i][0] != "h", positions[i][1]))
    for i in order:
        orbit, angle = positions[i]
        cols[f"{orbit}{angle}_db"] = acoustics.spl_db(pressure[i])
    return Table(cols)
