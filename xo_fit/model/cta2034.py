"""ANSI/CTA-2034-A sound-power weights of the 70 measuring positions, and the in-room response's mix.

ANSI/CTA-2034-A (2015), "Standard Method of Measurement for In-Home Loudspeakers", tabulates the weight each
point of the two 10-degree orbits carries in the sound power, by its polar angle t from the reference axis
(0 to 90 degrees; the table is mirrored about 90 degrees, so t and 180 - t weigh alike). Every position off
the axis and the rear has four points at its polar angle (h+t, h-t, v+t, v-t); the axis (h0 = v0) and the
rear (h180 = v180 = h-180) are one position each. The 70 table weights sum to 0.99637; the shares used here
are the table's divided by that sum, so they sum to 1.

A position is ``(orbit, angle)``: orbit ``"h"`` (horizontal, positive towards the listener's right facing
the speaker) or ``"v"`` (vertical, positive upwards), angle in whole degrees in (-180, 180]; the axis is
``("h", 0)`` and the rear ``("h", 180)``. docs/preference.md describes the weights and the early-reflections
reading that goes with them.
"""

from __future__ import annotations

#: A measuring position: orbit ("h" or "v") and angle in degrees, (-180, 180]; axis ("h", 0), rear ("h", 180).
Position = tuple[str, int]

#: Angular step of the standard's orbits, degrees.
STEP_DEG = 10

#: The 70 positions of ANSI/CTA-2034-A: both orbits in 10 degree steps, the axis and the rear counted once.
CTA_POSITIONS: tuple[Position, ...] = tuple(
    [("h", a) for a in range(-170, 181, STEP_DEG)] + [("v", a) for a in range(-170, 171, STEP_DEG) if a != 0])

#: The standard's sound-power weight of one position by its polar angle from the axis, degrees 0..90
#: (ANSI/CTA-2034-A, its table of sound-power weights); 100..180 mirror 80..0.
WEIGHT_TABLE: dict[int, float] = {
    0: 0.000604486, 10: 0.004730189, 20: 0.008955027, 30: 0.012387354, 40: 0.014989611,
    50: 0.016868154, 60: 0.018165962, 70: 0.019006744, 80: 0.019477787, 90: 0.019629373,
}

#: The estimated in-room response: 0.12 LW + 0.44 ER + 0.44 SP, in squared pressure (ANSI/CTA-2034-A).
IN_ROOM_WEIGHTS = (0.12, 0.44, 0.44)


def polar_angle(position: Position) -> int:
    """The angle of ``position`` from the reference axis, whole degrees 0..180 (|angle| on either orbit).

    Parameters
    ----------
    position : tuple
        ``(orbit, angle)`` with orbit "h" or "v" and angle in degrees, (-180, 180].

    Returns
    -------
    int
        The polar angle in degrees.
    """
    orbit, angle = position
    if orbit not in ("h", "v") or not -180 <= angle <= 180:
        raise ValueError(f"not a measuring position: {position!r}")
    return abs(int(angle))


def table_weight(theta_deg: int) -> float:
    """The standard's (un-normalised) weight of one position at polar angle ``theta_deg``.

    Parameters
    ----------
    theta_deg : int
        Polar angle from the axis, in degrees, a multiple of 10 in 0..180.

    Returns
    -------
    float
        ``WEIGHT_TABLE`` at ``theta_deg``, mirrored about 90 degrees for 100..180.
    """
    if theta_deg % STEP_DEG or not 0 <= theta_deg <= 180:
        raise ValueError(f"polar angle {theta_deg} is not on the standard's 10 degree grid")
    return WEIGHT_TABLE[min(theta_deg, 180 - theta_deg)]


def sound_power_weights() -> dict[Position, float]:
    """The share of the sound power each of the 70 positions carries (ANSI/CTA-2034-A), summing to 1.

    Each position's table weight (:func:`table_weight` of its :func:`polar_angle`) divided by the sum of
    the table weights of all 70 positions. The sound power of xo_fit.model.acoustics uses these.

    Returns
    -------
    dict
        Position -> weight (dimensionless), 70 entries in the order of :data:`CTA_POSITIONS`.
    """
    raw = {p: table_weight(polar_angle(p)) for p in CTA_POSITIONS}
    total = sum(raw.values())
    return {p: w / total for p, w in raw.items()}
