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

from xo_fit.constants import P_REF, SPL_FLOOR_DB
from xo_fit.model.cta2034 import CTA_POSITIONS, IN_ROOM_WEIGHTS, Position, sound_power_weights
from xo_fit.model.preference import Preference, PreferencePlan, evaluate


def driver_factors(response: np.ndarray, reference_voltage: np.ndarray, offset: np.ndarray,
                   frequencies: np.ndarray, speed_of_sound: float) -> np.ndarray:
    """Per-volt complex pressure of each driver, its offset delay included.

    Parameters
    ----------
    response : ndarray
        Each driver's response, complex, in Pa at its reference voltage, shape (D, F).
    reference_voltage : ndarray
        The voltage each response was measured at, in V, shape (D,).
    offset : ndarray
        Each acoustic centre's distance behind the reference plane, in m, shape (D,).
    frequencies : ndarray
        The grid, in Hz, shape (F,).
    speed_of_sound : float
        The speed of sound, in m/s.

    Returns
    -------
    ndarray
        Complex pressure per volt at the terminals, in Pa/V, shape (D, F).
    """
    w = 2 * np.pi * np.asarray(frequencies)
    delay = np.exp(-1j * w[None, :] * np.asarray(offset)[:, None] / speed_of_sound)
    return response / np.asarray(reference_voltage)[:, None] * delay


def pressures(voltages: np.ndarray, factors: np.ndarray) -> np.ndarray:
    """Each driver's pressure from its terminal voltage.

    Parameters
    ----------
    voltages : ndarray
        Driver terminal voltages, complex, in V, shape (B, D, F).
    factors : ndarray
        Per-volt pressures (:func:`driver_factors`), complex, in Pa/V, shape (D, F).

    Returns
    -------
    ndarray
        Each driver's pressure, complex, in Pa, shape (B, D, F).
    """
    return voltages * factors


def total(pressure: np.ndarray) -> np.ndarray:
    """The complex sum over the driver axis.

    Parameters
    ----------
    pressure : ndarray
        Per-driver pressures, complex, in Pa, shape (..., D, F).

    Returns
    -------
    ndarray
        The summed pressure, complex, in Pa, shape (..., F).
    """
    return pressure.sum(axis=-2)


def spl_db(pressure: np.ndarray) -> np.ndarray:
    """Sound pressure level re 20 uPa, clipped below at ``SPL_FLOOR_DB``.

    Parameters
    ----------
    pressure : ndarray
        Pressures (complex or real), in Pa, any shape (..., F).

    Returns
    -------
    ndarray
        Levels in dB SPL, the same shape (..., F).
    """
    mag = np.abs(pressure)
    with np.errstate(divide="ignore"):
        db = 20.0 * np.log10(mag / P_REF)
    return np.maximum(db, SPL_FLOOR_DB)


def phase_deg(x: np.ndarray) -> np.ndarray:
    """Phase of complex values in degrees, wrapped to (-180, 180].

    Parameters
    ----------
    x : ndarray
        Complex values (a pressure, an impedance, a ratio), any shape (..., F).

    Returns
    -------
    ndarray
        Phases in degrees, the same shape (..., F).
    """
    return np.rad2deg(np.angle(x))


# ----------------------------------------------------------------------------- off axis: ANSI/CTA-2034-A

# A measuring position, the 70 positions, their sound-power weights (the standard's table) and the in-room mix
# have one definition, in xo_fit.model.cta2034 (imported above; the names of a position: xo_fit.job.model.position).

#: The listening window: h0, h+-10, h+-20, h+-30, v+-10 (ANSI/CTA-2034-A; from memory, to be confirmed
#: against the standard's text).
LISTENING_WINDOW: tuple[Position, ...] = (("h", 0), ("h", 10), ("h", -10), ("h", 20), ("h", -20), ("h", 30),
                                          ("h", -30), ("v", 10), ("v", -10))
#: The early reflections' five groups (ANSI/CTA-2034-A): each group is averaged first, then the five averages.
#: The rear wall is the whole rear half of the horizontal orbit, h+-90 .. h180: the standard's text is ambiguous
#: there, and this is the reading its author gave in public (docs/directivity.md).
EARLY_REFLECTION_GROUPS: dict[str, tuple[Position, ...]] = {
    "floor": (("v", -20), ("v", -30), ("v", -40)),
    "ceiling": (("v", 40), ("v", 50), ("v", 60)),
    "front_wall": (("h", 0), ("h", 10), ("h", -10), ("h", 20), ("h", -20), ("h", 30), ("h", -30)),
    "side_walls": tuple(("h", s * a) for a in range(40, 81, 10) for s in (1, -1)),
    "rear_wall": tuple(("h", s * a) for a in range(90, 171, 10) for s in (1, -1)) + (("h", 180),),
}
#: The curves a directivity result holds, in column order.
CURVES = ("on_axis", "listening_window", "early_reflections", "sound_power", "estimated_in_room")


def curve_weights(positions: tuple[Position, ...]) -> dict[str, np.ndarray | None]:
    """The weight of each position in the listening window, the early reflections and the sound power.

    Parameters
    ----------
    positions : tuple
        The positions of the data, ``("h" | "v", degrees)`` each, in the data's order (A positions);
        ``positions[0]`` must be the axis.

    Returns
    -------
    dict
        ``"listening_window"``, ``"early_reflections"``, ``"sound_power"`` -> weights (dimensionless), shape (A,),
        each summing to 1; None for a curve whose positions are not all there.
    """
    index = {p: i for i, p in enumerate(positions)}
    n = len(positions)

    def mean_of(group):
        if not all(p in index for p in group):
            return None
        w = np.zeros(n)
        for p in group:
            w[index[p]] += 1.0 / len(group)
        return w

    lw = mean_of(LISTENING_WINDOW)
    groups = [mean_of(g) for g in EARLY_REFLECTION_GROUPS.values()]
    er = None if any(g is None for g in groups) else sum(groups) / len(groups)
    sp = None
    if all(p in index for p in CTA_POSITIONS):
        sp = np.zeros(n)
        for p, w in sound_power_weights().items():
            sp[index[p]] = w
    return {"listening_window": lw, "early_reflections": er, "sound_power": sp}


def missing_positions(positions: tuple[Position, ...], curve: str) -> list[Position]:
    """The positions ``curve`` needs that ``positions`` lacks."""
    need = {"listening_window": LISTENING_WINDOW, "sound_power": CTA_POSITIONS,
            "early_reflections": tuple(p for g in EARLY_REFLECTION_GROUPS.values() for p in g)}[curve]
    have = set(positions)
    return [p for p in dict.fromkeys(need) if p not in have]


def angle_pressures(voltages: np.ndarray, factors: np.ndarray) -> np.ndarray:
    """The summed pressure at every position.

    Parameters
    ----------
    voltages : ndarray
        Driver terminal voltages, complex, in V, shape (B, D, F).
    factors : ndarray
        Per-volt pressure of each driver at each position, complex, in Pa/V, shape (A, D, F).

    Returns
    -------
    ndarray
        The summed pressure at each position, complex, in Pa, shape (B, A, F).
    """
    return np.einsum("bdf,adf->baf", voltages, factors)


def used_positions(weights: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The positions some of ``weights`` count, and their weights.

    Parameters
    ----------
    weights : list of ndarray
        K weight vectors (dimensionless), each of shape (A,).

    Returns
    -------
    index : ndarray
        The indices of the positions with a weight above 0 in any vector, shape (A',).
    w : ndarray
        Their weights (dimensionless), shape (A', K).
    """
    w = np.stack(weights, axis=1)
    index = np.nonzero(np.any(w > 0, axis=1))[0]
    return index, w[index]


def curve_sums(voltages: np.ndarray, factors: np.ndarray, weights: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Mean squared pressure of each weighted curve, summing only the positions the weights count.

    Parameters
    ----------
    voltages : ndarray
        Driver terminal voltages, complex, in V, shape (B, D, F).
    factors : ndarray
        Per-volt pressure of each driver at each position, complex, in Pa/V, shape (A, D, F).
    weights : dict
        Curve name -> position weights (dimensionless), shape (A,) each (e.g. from :func:`curve_weights`).

    Returns
    -------
    dict
        Curve name -> mean squared pressure, in Pa^2, shape (B, F).
    """
    names = list(weights)
    index, w = used_positions([weights[n] for n in names])
    p2 = np.abs(angle_pressures(voltages, factors[index])) ** 2  # (B, A', F)
    return {n: np.einsum("baf,a->bf", p2, w[:, i]) for i, n in enumerate(names)}


def directivity(p2: np.ndarray, weights: dict[str, np.ndarray | None]) -> dict[str, np.ndarray]:
    """The ANSI/CTA-2034-A curves as mean squared pressure.

    Parameters
    ----------
    p2 : ndarray
        |p|^2 at every position, in Pa^2, shape (B, A, F); position 0 the axis.
    weights : dict
        The weights of :func:`curve_weights` (dimensionless), shape (A,) each, or None.

    Returns
    -------
    dict
        ``on_axis`` and those of ``listening_window``, ``early_reflections``, ``sound_power`` and
        ``estimated_in_room`` whose positions are all there -> mean squared pressure, in Pa^2, shape (B, F).
    """
    out = {"on_axis": p2[:, 0]}
    for name in ("listening_window", "early_reflections", "sound_power"):
        w = weights.get(name)
        if w is not None:
            out[name] = np.einsum("baf,a->bf", p2, w)
    if all(k in out for k in ("listening_window", "early_reflections", "sound_power")):
        a, b, c = IN_ROOM_WEIGHTS
        out["estimated_in_room"] = a * out["listening_window"] + b * out["early_reflections"] + c * out["sound_power"]
    return out


def power_db(p2: np.ndarray) -> np.ndarray:
    """Level of a mean squared pressure, floored at ``SPL_FLOOR_DB``.

    Parameters
    ----------
    p2 : ndarray
        Mean squared pressure, in Pa^2, any shape (..., F).

    Returns
    -------
    ndarray
        Levels in dB SPL re 20 uPa, the same shape (..., F).
    """
    with np.errstate(divide="ignore"):
        return np.maximum(10.0 * np.log10(np.asarray(p2) / P_REF**2), SPL_FLOOR_DB)


def preference_of(plan: PreferencePlan, curves: dict[str, np.ndarray], *, bound_lfx: bool = False) -> Preference:
    """S. E. Olive's predicted preference (:mod:`xo_fit.model.preference`) from the curves of :func:`directivity`.

    Parameters
    ----------
    plan : PreferencePlan
        :func:`xo_fit.model.preference.make_plan` of the curves' grid.
    curves : dict
        Mean squared pressure, in Pa^2, shape (..., F) each, by name: ``on_axis`` and those of ``listening_window``,
        ``early_reflections``, ``sound_power`` whose positions are measured (a curve not given makes the figures
        that need it null, with the reason). Levels are taken with :func:`power_db` (floored).
    bound_lfx : bool
        As :func:`xo_fit.model.preference.evaluate`: a bound instead of NaN where the sound power never falls
        6 dB (for a cost).

    Returns
    -------
    Preference
        The six figures, arrays of the batch shape (...), with a reason for each null.
    """
    db = {k: power_db(curves[k]) if k in curves else None
          for k in ("listening_window", "early_reflections", "sound_power")}
    return evaluate(plan, power_db(curves["on_axis"]), db["listening_window"], db["early_reflections"],
                    db["sound_power"], bound_lfx=bound_lfx)
