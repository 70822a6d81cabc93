"""The cost a fit minimises, and the metrics a designer reads, for batches of designs.

All errors are taken over the target band, one point of the log-spaced grid at
a time, so every octave weighs the same. Levels are dB SPL; the level of the
targets ``L`` is the job's ``[target] level`` or, with ``"auto"``, the level
that minimises the ``sum`` term: in closed form, the mean over the band of the
summed response's dB minus the system target's shape in dB (per design).

Terms (each a mean of squares, in dB^2; the cost is their weighted sum with
the weights of ``[cost]``):

``way``
    each driver's level against its way target ``L + T_d``. Deep in a way's
    stop band (where the way target lies more than STOP_BAND_DB below the
    level) only output above ``L - BREAKUP_FLOOR_DB`` counts: a breakup peak
    that rises toward the passband is punished, harmless depth is not (common
    practice: breakup 20 dB under the average level is inaudible).
``sum``
    the complex sum of all drivers against the system target ``L + S``. Where the
    system target is a null (more than NULL_DB below the level) only output above
    ``L + NULL_DB`` counts, and the automatic level leaves those points out.
``phase``
    through each crossover region (points where two adjacent way targets lie
    within XO_REGION_DB of each other) the phase difference of the two drivers
    against the phase difference of their targets. Each point's mismatch d is
    taken as the chord between the two phases on the unit circle,
    2 (1 - cos d) rad^2 (equal to d^2 for small d, bounded for large), in
    units of PHASE_DEG_PER_DB degrees (10 deg of mismatch costs like 1 dB of
    error).
    Way targets carry the textbook polarity (:mod:`xo_fit.model.targets`), so a
    tweeter wired inverted on an LR2 pair is matched.
``impedance``
    shortfall of |Z| below ``impedance_min`` in dB, 20 log10(Zmin / |Z|):
    the mean of its square plus the square of the worst point, so that even a
    narrow dip costs.
``protection`` (``[cost] protection`` > 0 only)
    each protected driver's peak excursion over its xmax and programme power over its rating at the
    ``[stress]`` drive, as squared dB excess (:mod:`xo_fit.model.protection`); the fused kernel has no such
    term, so a fit or snap with it runs on this reference cost (``needs_reference``).
``early_reflections`` / ``sound_power`` (off-axis jobs)
    the roughness of those ANSI/CTA-2034-A curves: the mean square deviation
    (dB^2) over the band of the curve's level from its own least-squares
    straight line on log frequency (the slope is the designer's choice; the
    smoothness is scored; every octave weighs alike on the log grid).
``preference`` (off-axis jobs with all 70 positions; only with a weight)
    S. E. Olive's predicted preference score of the design
    (:mod:`xo_fit.model.preference`, on the whole grid, not the band), as
    max(0, 10 - score)^2 / 100: it falls as the score rises and is 0 from 10
    up. Where the sound power never falls 6 dB the LFX is bounded by the
    grid's lowest frequency, so the term stays finite.

With ``[target] reference = "listening_window"`` the ``sum`` term (and the
automatic level) uses the listening window's level instead of the on-axis sum.

Metrics (result.json), in a designer's words:

``rms_error_db``
    how far, on average (root mean square over the band), the summed response
    strays from the target.
``max_error_db``
    the worst deviation of the summed response from the target in the band.
``phase_mismatch_deg``
    the worst phase misalignment between adjacent ways through their crossover
    regions, relative to the alignment's own phase relation.
``impedance_min_ohm`` / ``impedance_min_hz``
    the lowest impedance the amplifier sees within the band (not counting the
    source's own resistance) and where it occurs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from xo_fit.model.acoustics import (angle_pressures, curve_sums, curve_weights, directivity, power_db,
                                    preference_of, spl_db)
from xo_fit.model.preference import cost_term, make_plan
from xo_fit.constants import SPL_FLOOR_DB, Z_SHORT_OHM
from xo_fit.grid import band_mask

#: Where a way target lies this far below the level, only excess output counts (dB).
STOP_BAND_DB = 30.0
#: Output this far below the level is harmless in a stop band (dB; common practice).
BREAKUP_FLOOR_DB = 20.0
#: Adjacent way targets within this many dB of each other mark a crossover region.
XO_REGION_DB = 6.0
#: Where the system target lies this far below its level (dB) it is a null (an in-phase LR2 pair at fc): there
#: the sum only has to be as deep, and the point takes no part in the automatic level. One floor for target and
#: response alike, instead of the logarithm's floor of each (common practice: output 60 dB under the level in
#: a narrow null is inaudible; a 5-digit handbook ladder reaches about -96 dB there).
NULL_DB = -60.0
#: Degrees of phase mismatch that cost like one dB of level error.
PHASE_DEG_PER_DB = 10.0
TERMS = ("way", "sum", "phase", "impedance", "stress", "early_reflections", "sound_power")
#: The terms that need off-axis responses; left out of an on-axis job's terms.
OFF_AXIS_TERMS = ("early_reflections", "sound_power")


def impedance_minimum(frequencies: np.ndarray, impedance: np.ndarray,
                      band: tuple[float, float] | None) -> tuple[np.ndarray, np.ndarray]:
    """Minimum |Z| (ohm) and its frequency (Hz) over the band; impedance (..., F) -> two arrays (...)."""
    mask = band_mask(frequencies, band)
    mag = np.abs(impedance[..., mask])
    i = np.argmin(mag, axis=-1)
    return np.take_along_axis(mag, i[..., None], axis=-1)[..., 0], frequencies[mask][i]


def wrap_deg(x: np.ndarray) -> np.ndarray:
    """Degrees wrapped to (-180, 180]."""
    return 180.0 - np.mod(180.0 - x, 360.0)


def phase_error_deg(ratio: np.ndarray, target_diff_deg: np.ndarray) -> np.ndarray:
    """Phase error of two adjacent ways, degrees in (-180, 180]: the phase of p_a / p_b (``ratio``, complex)
    less the phase difference their targets intend (``target_diff_deg``), wrapped once."""
    return wrap_deg(np.rad2deg(np.angle(ratio)) - target_diff_deg)


@dataclass(frozen=True, eq=False)
class Evaluation:
    """The cost of a batch of B designs.

    Attributes
    ----------
    cost : ndarray
        The total cost (dimensionless), shape (B,); inf for a singular design (a short).
    terms : dict
        Term name -> the term's value before its weight (dimensionless), shape (B,) each; the cost is the
        weighted sum.
    level_db : ndarray
        The level the targets were placed at, in dB SPL, shape (B,).
    violations : dict or None
        With [limits]: each limit's violation (a relative excess, dimensionless, 0 when met), shape (B,) each,
        and their ``total`` (:mod:`xo_fit.model.limits`; inf for a singular design); None without.
    """

    cost: np.ndarray
    terms: dict
    level_db: np.ndarray
    violations: dict | None = None


class CostModel:
    """The cost of a job's designs: built once from the system and its targets, then applied to batches."""

    def __init__(self, system, targets) -> None:
        self.system = system
        self.targets = targets
        spec = system.job.cost
        self.weights = {"way": spec.way, "sum": spec.sum, "phase": spec.phase, "impedance": spec.impedance,
                        "stress": spec.stress, "early_reflections": spec.early_reflections,
                        "sound_power": spec.sound_power, "preference": spec.preference,
                        "protection": spec.protection}
        self.off_axis = bool(system.positions)
        # the predicted preference's plan of the grid (load_system refuses a job whose grid or positions lack it)
        self.preference_plan = make_plan(system.frequencies) if spec.preference > 0 else None
        self.reference = system.job.target.reference
        self.curve_weights = curve_weights(system.positions) if self.off_axis else {}
        # the curves the cost weighs (their positions are the only ones it reads)
        self.needed = [n for n, used in (("listening_window", self.reference == "listening_window"),
                                         ("early_reflections", spec.early_reflections > 0),
                                         ("sound_power", spec.sound_power > 0)) if used and self.off_axis]
        self.rated = rated_parts(system) if spec.stress > 0 else []
        drive = system.job.stress
        self.drive_scale = (math.sqrt(drive.power * drive.rated_impedance) / system.network.source_voltage
                            if self.rated else 1.0)
        self.impedance_floor = spec.impedance_min
        self.protection = None
        if spec.protection > 0:
            from xo_fit.model.protection import protection_model

            self.protection = protection_model(system)
        #: terms the fused kernel lacks: a search must score with :meth:`evaluate` (xo_fit.search.fitting); a
        #: protection weight without a driver to protect is a term of 0 (the job reader warns of it)
        self.needs_reference = self.protection is not None
        band = targets.band
        self.band = band
        self.t_sys_db = spl_db_unit(targets.system)[band]
        self.keep = self.t_sys_db > NULL_DB  # (Fb,) points that are not nulls of the target
        if not self.keep.any():
            self.keep = np.ones_like(self.keep)
        t_way = np.where(targets.has_way[:, None], targets.ways, 1.0)
        self.t_way_db = spl_db_unit(t_way)[:, band]
        self.has_way = targets.has_way
        self.stop = self.t_way_db < -STOP_BAND_DB
        # crossover regions between adjacent ways
        self.pairs = []
        for a, b in adjacent_ways(self.t_way_db, self.has_way):
            region = np.abs(self.t_way_db[a] - self.t_way_db[b]) <= XO_REGION_DB
            region &= np.maximum(self.t_way_db[a], self.t_way_db[b]) > -XO_REGION_DB - 6.0
            if region.any():
                target_diff = np.rad2deg(np.angle(targets.ways[a, band] / targets.ways[b, band]))
                self.pairs.append((a, b, region, target_diff))
        #: the hard limits ([limits]), or None: a search ranks by them first (feasibility first)
        self.limits = None
        if system.job.limits.active:
            from xo_fit.model.limits import LimitModel

            self.limits = LimitModel(self, rated_parts(system))

    # ------------------------------------------------------------------ terms

    def evaluate(self, values: np.ndarray) -> Evaluation:
        """Cost of designs ``values`` (B, P) (SI part values)."""
        sim = self.system.simulate(values)
        return self.evaluate_simulation(sim, values)

    def evaluate_simulation(self, sim, values: np.ndarray | None = None) -> Evaluation:
        """The cost of simulated designs; ``values`` (B, P) are needed for the stress term (its part currents)."""
        band = self.band
        p_db = spl_db(sim.pressure[..., band])  # (B, D, Fb)
        curves = self.curves(sim)
        s_db = self.reference_db(sim, curves)  # (B, Fb)
        target = self.t_sys_db
        level = (np.mean((s_db - target)[..., self.keep], axis=-1) if self.targets.level_db is None
                 else np.full(s_db.shape[0], self.targets.level_db))
        terms = {
            "way": self._way(p_db, level),
            "sum": np.mean(self.sum_error(s_db, level) ** 2, axis=-1),
            "phase": self._phase(sim.pressure[..., band]),
            "impedance": self._impedance(sim.impedance[..., band]),
            "stress": self._stress(values, sim.impedance.shape[0]),
        }
        if self.protection is not None:
            terms["protection"] = self.protection.penalty(sim.voltages)
        if self.off_axis:
            for k in OFF_AXIS_TERMS:
                terms[k] = (roughness(power_db(curves[k][..., band]), np.log2(self.system.frequencies[band]))
                            if self.weights[k] > 0 else np.zeros(s_db.shape[0]))
        if self.preference_plan is not None:
            terms["preference"] = self.preference_term(sim)
        cost = sum(self.weights[k] * terms[k] for k in terms)
        finite = (np.all(np.isfinite(sim.impedance[..., band]), axis=-1)
                  & np.all(np.isfinite(sim.pressure[..., band]), axis=(-2, -1)))
        cost = np.where(np.isfinite(cost) & finite, cost, np.inf)  # a singular point (a short): infeasible
        violations = None
        if self.limits is not None:
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                violations = self.limits.violations(sim, values, level)
            violations["total"] = np.where(np.isfinite(cost) & np.isfinite(violations["total"]),
                                           violations["total"], np.inf)
        return Evaluation(cost=cost, terms=terms, level_db=level, violations=violations)

    def curves(self, sim) -> dict[str, np.ndarray]:
        """The ANSI/CTA-2034-A curves the cost weighs (Pa^2, (B, F) each; from the positions they need only) of
        a Simulation; {} when it weighs none."""
        if not self.needed:
            return {}
        weights = {}
        for n in self.needed:
            w = self.curve_weights[n]
            assert w is not None  # load_system refuses a job whose positions lack a curve the cost weighs
            weights[n] = w
        return curve_sums(sim.voltages, self.system.angle_factors, weights)

    def all_curves(self, sim) -> dict[str, np.ndarray]:
        """Every ANSI/CTA-2034-A curve the job's positions allow (Pa^2, (B, F)); {} on axis."""
        if not self.off_axis:
            return {}
        return directivity(np.abs(angle_pressures(sim.voltages, self.system.angle_factors)) ** 2,
                           self.curve_weights)

    def preference_term(self, sim) -> np.ndarray:
        """The preference term (B,) of a Simulation, unweighted: max(0, 10 - score)^2 / 100 of each design's
        predicted preference (LFX bounded by the grid's lowest frequency, so it stays finite)."""
        assert self.preference_plan is not None  # asked only of a cost that weighs the preference
        pref = preference_of(self.preference_plan, self.all_curves(sim), bound_lfx=True)
        return cost_term(pref.score, 1.0)

    def reference_db(self, sim, curves: dict | None = None) -> np.ndarray:
        """The level (dB SPL, (B, Fb)) the system target applies to: the on-axis sum, or the listening window."""
        if self.reference == "listening_window":
            curves = self.curves(sim) if curves is None else curves
            return power_db(curves["listening_window"][..., self.band])
        return spl_db(sim.total[..., self.band])

    def sum_error(self, s_db: np.ndarray, level: np.ndarray) -> np.ndarray:
        """The summed level's error against the system target, dB (B, Fb): at the target's nulls only output
        above ``level + NULL_DB`` counts. s_db: (B, Fb) dB SPL in the band; level: (B,)."""
        rel = s_db - level[:, None]
        return np.where(self.keep, rel - self.t_sys_db, np.maximum(rel - NULL_DB, 0.0))

    def _way(self, p_db: np.ndarray, level: np.ndarray) -> np.ndarray:
        rows = np.nonzero(self.has_way)[0]
        if rows.size == 0:
            return np.zeros(p_db.shape[0])
        lv = level[:, None, None]
        p = p_db[:, rows]
        err = p - (lv + self.t_way_db[rows])
        excess = np.maximum(p - (lv - BREAKUP_FLOOR_DB), 0.0)
        err = np.where(self.stop[rows], excess, err)
        return np.mean(err**2, axis=(-2, -1))

    def _phase_errors(self, pressure: np.ndarray) -> list[np.ndarray]:
        out = []
        for a, b, region, target_diff in self.pairs:
            with np.errstate(divide="ignore", invalid="ignore"):  # a silent way: its phase is undefined
                out.append(phase_error_deg(pressure[:, a, region] / pressure[:, b, region], target_diff[region]))
        return out

    def _phase(self, pressure: np.ndarray) -> np.ndarray:
        errs = self._phase_errors(pressure)
        if not errs:
            return np.zeros(pressure.shape[0])
        chord = [np.rad2deg(1.0) ** 2 * 2 * (1 - np.cos(np.deg2rad(e))) for e in errs]
        return np.mean([np.mean(c, axis=-1) for c in chord], axis=0) / PHASE_DEG_PER_DB**2

    def _stress(self, values: np.ndarray | None, b: int) -> np.ndarray:
        """Mean over rated parts of the squared excess over their ratings, dB (see :func:`stress_excess_db`)."""
        if not self.rated:
            return np.zeros(b)
        if values is None:
            raise ValueError("the stress term needs the part values")
        from xo_fit.solver.dense import branch_currents

        v = np.atleast_2d(np.asarray(values, dtype=float))
        amps = branch_currents(self.system.network, v)[..., self.band] * self.drive_scale  # (B, branches, Fb)
        w = 2 * np.pi * self.system.frequencies[self.band]
        e = [stress_excess_db(kind, np.abs(amps[:, j]) ** 2, v[:, col], w, rating)
             for j, col, kind, rating in self.rated]
        return np.mean(np.square(e), axis=0)

    def _impedance(self, z: np.ndarray) -> np.ndarray:
        if self.impedance_floor <= 0:
            return np.zeros(z.shape[0])
        short = np.maximum(20 * np.log10(self.impedance_floor / np.maximum(np.abs(z), Z_SHORT_OHM)), 0.0)
        return np.mean(short**2, axis=-1) + np.max(short, axis=-1) ** 2

    # ------------------------------------------------------------------ metrics

    def breakdown(self, values: np.ndarray) -> dict:
        """Where the error of one design (P,) lies: per way over its passband (its target within 6 dB of the
        level) and per crossover region (the sum's error and the phase error), rms and worst with frequency."""
        sim = self.system.simulate(values, dense=True)
        ev = self.evaluate_simulation(sim, values)
        f = self.system.frequencies[self.band]
        level = ev.level_db[:1]
        names = [d.name for d in self.system.job.drivers]
        ways = []
        p_db = spl_db(sim.pressure[0][:, self.band])
        for k in np.nonzero(self.has_way)[0]:
            passband = self.t_way_db[k] > -6.0
            if not passband.any():
                continue
            err = (p_db[k] - level[0] - self.t_way_db[k])[passband]
            i = int(np.argmax(np.abs(err)))
            ways.append({"way": names[k], "from_hz": float(f[passband][0]), "to_hz": float(f[passband][-1]),
                         "rms_db": float(np.sqrt(np.mean(err**2))), "worst_db": float(err[i]),
                         "worst_hz": float(f[passband][i])})
        sum_err = self.sum_error(self.reference_db(sim)[:1], level)[0]
        regions = []
        for (a, b, region, _), ph in zip(self.pairs, self._phase_errors(sim.pressure[:1, :, self.band])):
            e = sum_err[region]
            i = int(np.argmax(np.abs(e)))
            j = int(np.argmax(np.abs(ph[0])))
            regions.append({"ways": f"{names[a]}-{names[b]}", "from_hz": float(f[region][0]),
                            "to_hz": float(f[region][-1]), "sum_rms_db": float(np.sqrt(np.mean(e**2))),
                            "sum_worst_db": float(e[i]), "sum_worst_hz": float(f[region][i]),
                            "phase_worst_deg": float(ph[0][j]), "phase_worst_hz": float(f[region][j])})
        i = int(np.argmax(np.abs(sum_err)))
        return {"ways": ways, "crossovers": regions,
                "sum": {"rms_db": float(np.sqrt(np.mean(sum_err**2))), "worst_db": float(sum_err[i]),
                        "worst_hz": float(f[i])}}

    def metrics(self, values: np.ndarray) -> tuple[dict, Evaluation]:
        """Metrics and evaluation of one design (P,) or (1, P), as plain floats for result.json
        (solved on the dense reference path: one reported design needs no compiled kernel)."""
        sim = self.system.simulate(values, dense=True)
        ev = self.evaluate_simulation(sim, values)
        band = self.band
        curves = self.all_curves(sim)
        err = self.sum_error(self.reference_db(sim, curves)[:1], ev.level_db[:1])[0]
        phase = self._phase_errors(sim.pressure[:1, :, band])
        zmin, fmin = impedance_minimum(self.system.frequencies, sim.impedance[0], self.system.job.target.band)
        m = {
            "rms_error_db": float(np.sqrt(np.mean(err**2))),
            "max_error_db": float(np.max(np.abs(err))),
            "phase_mismatch_deg": float(max((np.max(np.abs(e)) for e in phase), default=0.0)),
            "impedance_min_ohm": float(zmin),
            "impedance_min_hz": float(fmin),
            "level_db": float(ev.level_db[0]),
        }
        if "listening_window" in curves:
            lw = self.sum_error(power_db(curves["listening_window"][:1, band]), ev.level_db[:1])[0]
            m["listening_window_rms_db"] = float(np.sqrt(np.mean(lw**2)))
        if "sound_power" in curves and "listening_window" in curves:
            di = power_db(curves["listening_window"][0, band]) - power_db(curves["sound_power"][0, band])
            m["sound_power_di_min_db"] = float(np.min(di))
            m["sound_power_di_max_db"] = float(np.max(di))
            m["sound_power_di_range_db"] = float(np.max(di) - np.min(di))
        return m, ev


def roughness(y_db: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Mean square deviation (dB^2, (B,)) of curves ``y_db`` (B, Fb) from their own least-squares straight
    lines on ``x`` (Fb,), e.g. log2 of frequency."""
    xc = x - x.mean()
    yc = y_db - y_db.mean(axis=-1, keepdims=True)
    slope = (yc @ xc) / (xc @ xc)
    return np.mean((yc - slope[..., None] * xc) ** 2, axis=-1)


def rated_parts(system) -> list[tuple[int, int, str, float]]:
    """The parts with a rating: (branch index, values column, kind R/L/C, rating in W, V or A)."""
    out = []
    col = 0
    parts = system.job.valued_parts
    for j, br in enumerate(system.network.branches):
        if br.kind == "D":
            continue
        if parts[col].rating is not None:
            out.append((j, col, br.kind, float(parts[col].rating)))
        col += 1
    return out


def stress_excess_db(kind: str, i2: np.ndarray, x: np.ndarray, w: np.ndarray, rating: float) -> np.ndarray:
    """How far a part's stress exceeds what its rating allows, 0 within it.

    A resistor's programme power (the band's mean: equal power per log-spaced point, pink) is judged against
    half its rating (the 2x margin of common practice), as 10 log10; a capacitor's peak voltage and a coil's
    peak current against their ratings, as 20 log10.

    Parameters
    ----------
    kind : str
        ``"R"``, ``"C"`` or ``"L"``.
    i2 : ndarray
        |I|^2 of the part's RMS current over the band at the stress drive, in A^2, shape (B, Fb).
    x : ndarray
        The part's value in ohm, F or H (by kind), shape (B,).
    w : ndarray
        Angular frequencies of the band, in rad/s, shape (Fb,).
    rating : float
        The part's rating: in W (R), V (C) or A (L).

    Returns
    -------
    ndarray
        The excess in dB (0 within the rating), shape (B,).
    """
    if kind == "R":
        ratio = np.mean(i2, axis=-1) * x / (rating / 2)
    elif kind == "C":
        ratio = 2 * np.max(i2 / w**2, axis=-1) / x**2 / rating**2
    else:
        ratio = 2 * np.max(i2, axis=-1) / rating**2
    with np.errstate(divide="ignore"):
        return 10 * np.log10(np.maximum(ratio, 1.0))


def spl_db_unit(x: np.ndarray) -> np.ndarray:
    """20 log10 |x| for unit-level targets, floored at SPL_FLOOR_DB."""
    with np.errstate(divide="ignore"):
        return np.maximum(20 * np.log10(np.abs(x)), SPL_FLOOR_DB)


def adjacent_ways(way_db: np.ndarray, has_way: np.ndarray) -> list[tuple[int, int]]:
    """Pairs of ways that meet at a crossover: the ways with targets, ordered by where their passband
    begins, taken neighbour by neighbour. way_db: (D, F) way targets in dB; has_way: bool (D,)."""
    order = [i for i in np.argsort([_low_edge_db(way_db[i]) for i in range(len(has_way))]) if has_way[i]]
    return list(zip(order, order[1:]))


def _low_edge_db(t_db: np.ndarray) -> float:
    """Index of the first point where a way target is within 6 dB of its passband: orders ways by frequency."""
    above = np.nonzero(t_db > -6.0)[0]
    return float(above[0]) if above.size else float("inf")


def simulation_metrics(system, sim) -> dict:
    """Metrics that need no targets: the impedance minimum of the first design of a Simulation."""
    zmin, fmin = impedance_minimum(system.frequencies, sim.impedance[0], system.job.target.band)
    return {"impedance_min_ohm": float(zmin), "impedance_min_hz": float(fmin)}
