"""Hard limits (``[limits]``): how far a batch of designs breaks each one, normalised (the numpy reference).

A limit is a constraint, not a weight: the search ranks designs by feasibility first (:mod:`xo_fit.search.
engines`), so it needs, for every candidate, one number per limit that is 0 exactly when the limit is met and
grows with the excess. Each is a dimensionless relative excess ("ratio - 1"), so that a total over limits of
different units means something:

``impedance_min``
    max(0, floor / |Z|min - 1), |Z|min the lowest |Z| over the target band.
``ratings``
    max over the rated parts of max(0, stress / what the rating allows - 1), judged as ``Design.stress``'s
    ``within_rating`` does at the ``[stress]`` drive: a resistor's programme power (pink noise over the band)
    against half its rating, a capacitor's peak voltage and a coil's peak current against theirs.
``protection``
    max over the protected drivers' figures of max(0, figure / limit - 1): the peak sine excursion over the band
    against ``xmax`` and the programme power against ``power`` (:mod:`xo_fit.model.protection`).
``breakup_db``
    max over the ways of max(0, e) ln(10) / 20, e the dB by which the way's loudest output in its stop band
    (where its way target lies more than ``breakup_db`` + BREAKUP_GUARD_DB under the level) comes closer to the
    level than ``breakup_db``: the natural log of the amplitude ratio, ~ ratio - 1 when small (common practice:
    breakup more than 20 dB under the average level is inaudible).

The total violation is their sum. The fused kernel (:mod:`xo_fit.model.fused_limits`) computes the same
numbers inside its frequency loop; tests hold the two to 1e-9.
"""

from __future__ import annotations

import math

import numpy as np

from xo_fit.constants import Z_SHORT_OHM

#: The limits in the order of the kernel's output columns (after the total).
NAMES = ("impedance_min", "ratings", "protection", "breakup_db")
#: A way's stop band for the breakup rule: its target this many dB further under the level than the rule asks
#: (with 20 dB, the cost's stop band, 30 dB under: an exact filter then meets the rule by 10 dB).
BREAKUP_GUARD_DB = 10.0
#: dB of amplitude to a natural log of the amplitude ratio.
LN10_20 = math.log(10.0) / 20.0


class LimitModel:
    """The limits of a job's cost model ``cm`` (a :class:`xo_fit.model.cost.CostModel`; ``rated``: its system's
    rated parts, :func:`xo_fit.model.cost.rated_parts`), for batches.

    ``floor``: ohm (0: none); ``rated``: (branch, column, kind, rating) of the rated parts judged (ratings);
    ``protection``: the :class:`~xo_fit.model.protection.Protection` judged, or None; ``breakup_db``: dB (0:
    none); ``stop``: bool (D, Fb), each way's stop band for the breakup rule.
    """

    def __init__(self, cm, rated: list) -> None:
        system = cm.system
        spec = system.job.limits
        self.cm = cm
        self.floor = spec.impedance_min
        drive = system.job.stress
        self.rated = list(rated) if spec.ratings and drive.power else []
        self.drive_scale = (math.sqrt(drive.power * drive.rated_impedance) / system.network.source_voltage
                            if drive.power else 1.0)
        self.protection = None
        if spec.protection:
            from xo_fit.model.protection import protection_model

            self.protection = protection_model(system)
        self.breakup_db = spec.breakup_db
        self.stop = ((cm.t_way_db < -(self.breakup_db + BREAKUP_GUARD_DB)) & cm.has_way[:, None]
                     if self.breakup_db > 0 else np.zeros_like(cm.stop))
        self.names = tuple(n for n, on in zip(NAMES, (self.floor > 0, spec.ratings, spec.protection,
                                                     self.breakup_db > 0)) if on)

    def judged_protection(self) -> tuple[np.ndarray, np.ndarray]:
        """Which protected drivers' excursion and power are judged: two bool arrays (N,); only where the job's
        protection is modelled (``protection`` not None)."""
        p = self.protection
        assert p is not None  # the callers ask only where protection is modelled
        return (np.isfinite(p.xmax) & np.all(np.isfinite(p.x_per_volt), axis=-1)), np.isfinite(p.rating)

    def violations(self, sim, values: np.ndarray | None, level: np.ndarray) -> dict[str, np.ndarray]:
        """Each limit's signed excess (B,; > 0 by how much it is broken, <= 0 by how much room is left; 0 for a
        limit with nothing to judge) and ``total``, the sum of the excesses above 0 (the total violation), for
        simulated designs (a Simulation), their values (B, P) (the ratings need the part currents) and their
        levels (B,, dB SPL)."""
        band = self.cm.band
        b = sim.impedance.shape[0]
        out = {n: np.zeros(b) for n in NAMES}
        if self.floor > 0:
            zmin = np.min(np.maximum(np.abs(sim.impedance[..., band]), Z_SHORT_OHM), axis=-1)
            out["impedance_min"] = self.floor / zmin - 1.0
        if self.rated:
            out["ratings"] = self._ratings(values, b)
        if self.protection is not None:
            out["protection"] = self._protection(sim.voltages)
        if self.stop.any():
            from xo_fit.model.acoustics import spl_db

            p_db = spl_db(sim.pressure[..., band])  # (B, D, Fb)
            loud = np.max(np.where(self.stop[None], p_db, -np.inf), axis=-1)  # (B, D); -inf: no stop band
            excess = np.max(loud, axis=-1) - level + self.breakup_db
            out["breakup_db"] = excess * LN10_20
        total = np.zeros(b)
        for n in NAMES:
            total = total + np.maximum(out[n], 0.0)
        out["total"] = total
        return out

    def _ratings(self, values: np.ndarray | None, b: int) -> np.ndarray:
        if values is None:
            raise ValueError("the ratings limit needs the part values")
        from xo_fit.solver.dense import branch_currents

        v = np.atleast_2d(np.asarray(values, dtype=float))
        band = self.cm.band
        amps = branch_currents(self.cm.system.network, v)[..., band] * self.drive_scale
        w = 2 * np.pi * self.cm.system.frequencies[band]
        worst = np.full(b, -np.inf)
        for j, col, kind, rating in self.rated:
            i2 = np.abs(amps[:, j]) ** 2
            if kind == "R":
                ratio = np.mean(i2, axis=-1) * v[:, col] / (rating / 2)
            elif kind == "C":
                ratio = np.sqrt(2 * np.max(i2 / w**2, axis=-1)) / v[:, col] / rating
            else:
                ratio = np.sqrt(2 * np.max(i2, axis=-1)) / rating
            worst = np.maximum(worst, ratio - 1.0)
        return worst

    def _protection(self, voltages: np.ndarray) -> np.ndarray:
        p = self.protection
        assert p is not None  # called only where protection is modelled
        use_x, use_p = self.judged_protection()
        if not (use_x.any() or use_p.any()):
            return np.zeros(voltages.shape[0])
        worst = np.full(voltages.shape[0], -np.inf)
        if use_x.any():
            x, _ = p.peaks(voltages)
            worst = np.maximum(worst, np.max(x[:, use_x] / p.xmax[use_x], axis=-1) - 1.0)
        if use_p.any():
            worst = np.maximum(worst, np.max(p.power(voltages)[:, use_p] / p.rating[use_p], axis=-1) - 1.0)
        return worst


def breakup_points(t_way_db: np.ndarray, has_way: np.ndarray, p_db: np.ndarray, level: float,
                   frequencies: np.ndarray, breakup_db: float) -> list[tuple[int, float, float]]:
    """Each way's loudest output in its stop band for the breakup rule: (way index, Hz, dB under the level).

    t_way_db: way targets (D, Fb), dB re the level; has_way: bool (D,); p_db: one design's driver levels (D, Fb),
    dB SPL; level: dB SPL; frequencies: the band's (Fb,); breakup_db: the rule's dB (> 0). Ways without a stop
    band are left out.
    """
    stop = (t_way_db < -(breakup_db + BREAKUP_GUARD_DB)) & has_way[:, None]
    out = []
    for k in np.nonzero(stop.any(axis=-1))[0]:
        i = int(np.argmax(np.where(stop[k], p_db[k], -np.inf)))
        out.append((int(k), float(frequencies[i]), float(level - p_db[k, i])))
    return out
