"""Tolerance spread: Monte Carlo of built speakers, sensitivity per part, yield, worst cases, pair matching.

Every valued part is drawn around its nominal value with its own tolerance
(``tolerance`` in its [[part]]) or the [spread] default for its kind:
``uniform`` draws are uniform within +-tolerance; ``normal`` draws take the
tolerance as two standard deviations (about 95 % of parts inside it).
``qmc = true`` uses scrambled Sobol points (scipy.stats.qmc) instead of
pseudo-random ones. Draws are seeded and solved in chunks of CHUNK designs,
so memory stays bounded for any number of draws: the level percentiles come
from per-frequency histograms of each build's deviation from the nominal
level (bins of HIST_STEP_DB over +-HIST_RANGE_DB, coarser where a large grid
would take more than HIST_BYTES; exact to half a bin).

Figures (result.json, stage spread):

* percentiles p05, p50, p95 of each driver's level and of the sum (spread.csv);
* yield: the share of builds whose summed response stays within +-band_db of
  the nominal design over the target band, and the share meeting the limits
  (rms error against the target at most ``rms_limit_db``, |Z| at least the
  job's impedance floor);
* the worst draw (largest deviation of the sum from nominal over the band);
* sensitivity: for each part, the change of the summed response in dB per +1 %
  of its value (central differences), at worst over the band and at each
  crossover, ranked: the part to buy tighter comes first;
* worst-case corners: every part at + or - its tolerance, all 2^n corners up
  to CORNERS_MAX parts, else the two corners the sensitivities' signs point to;
* pair matching: the largest difference over the band between two speakers
  built independently (draws taken in pairs), p50 and p95.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from xo_fit.config import (CHUNK, CHUNK_VALUES, CORNERS_MAX, DRAWS_BYTES, HIST_BYTES, HIST_RANGE_DB, HIST_STEP_DB,
                           SENS_STEP)
from xo_fit.model.acoustics import spl_db
from xo_fit.model.draws import draw_factors, part_tolerances


def _accumulate(counts, dev, offset, scale):
    """counts[c, f, bin(dev[b, c, f])] += 1 for every draw b (numba; nearest bin, clipped to the ends)."""
    _accumulate_jit(counts, dev, offset, scale)


def _accumulate_impl(counts, dev, offset, scale):
    nb = counts.shape[2]
    for b in range(dev.shape[0]):
        for c in range(dev.shape[1]):
            for f in range(dev.shape[2]):
                k = int(np.floor((dev[b, c, f] + offset) * scale + 0.5))
                if k < 0:
                    k = 0
                elif k >= nb:
                    k = nb - 1
                counts[c, f, k] += 1


class _LazyJit:
    def __init__(self, fn):
        self.fn = fn
        self.compiled = None

    def __call__(self, *args):
        if self.compiled is None:
            import numba

            self.compiled = numba.njit(cache=True, nogil=True)(self.fn)
        return self.compiled(*args)


_accumulate_jit = _LazyJit(_accumulate_impl)


class _Hist:
    """Per-frequency histograms of deviations (dB) for C curves: percentiles with bounded memory."""

    def __init__(self, curves: int, nf: int) -> None:
        self.nb = int(round(2 * HIST_RANGE_DB / HIST_STEP_DB)) + 1
        self.nb = max(min(self.nb, HIST_BYTES // (4 * curves * nf)) // 2 * 2 + 1, 3)  # odd: a bin centred on 0
        self.step = 2 * HIST_RANGE_DB / (self.nb - 1)
        self.counts = np.zeros((curves, nf, self.nb), dtype=np.int32)
        self.low = np.full((curves, nf), np.inf)
        self.high = np.full((curves, nf), -np.inf)
        self.n = 0

    def add(self, dev: np.ndarray) -> None:
        """dev: (B, C, F) deviations in dB."""
        _accumulate(self.counts, np.ascontiguousarray(dev, dtype=float), HIST_RANGE_DB, 1.0 / self.step)
        self.low = np.minimum(self.low, dev.min(axis=0))
        self.high = np.maximum(self.high, dev.max(axis=0))
        self.n += dev.shape[0]

    def percentile(self, q: float) -> np.ndarray:
        """The q-th percentile (0..100) of the deviation, (C, F) dB, interpolated within bins."""
        cum = np.cumsum(self.counts, axis=-1, dtype=np.int32)  # at most 10^8 draws: no overflow
        target = q / 100.0 * self.n
        k = np.argmax(cum >= target - 1e-9, axis=-1)  # first bin reaching the target
        below = np.where(k > 0, np.take_along_axis(cum, np.maximum(k - 1, 0)[..., None], -1)[..., 0], 0)
        here = np.take_along_axis(self.counts, k[..., None], -1)[..., 0]
        frac = np.where(here > 0, (target - below) / np.maximum(here, 1), 0.5)
        p = (k - 0.5 + np.clip(frac, 0, 1)) * self.step - HIST_RANGE_DB
        # never outside the deviations seen: zero tolerance gives exactly zero spread, not half a bin
        return np.clip(p, self.low, self.high)


@dataclass(frozen=True, eq=False)
class SpreadResult:
    """What a tolerance spread found (result.json's ``spread`` section and spread.csv are made of it).

    The C curves of the level arrays are the sum first (the curve the system target applies to: the on-axis sum,
    or the listening window where ``[target] reference`` names it), then each driver's on-axis level: C = 1 + D.

    Attributes
    ----------
    samples : int
        The number of builds drawn (dimensionless).
    nominal_db : ndarray
        The nominal design's levels, in dB SPL, shape (C, F).
    p05, p50, p95 : ndarray
        The 5th, 50th and 95th percentile of the builds' levels, in dB SPL, shape (C, F) (the nominal level plus
        the percentile of the deviation from it, from the histograms; never outside the deviations seen).
    yield_band : float
        The share of builds whose sum stays within +-``band_db`` of the nominal over the target band
        (dimensionless, 0..1).
    yield_limits : float
        The share of builds meeting ``limits``: rms error against the target (each at its own best level) at most
        ``rms_error_db`` and |Z| over the band at least ``impedance_min_ohm`` (dimensionless, 0..1).
    limits : dict
        The limits the yields were judged by: ``band_db`` and ``rms_error_db`` in dB, ``impedance_min_ohm`` in ohm
        (0: no floor).
    worst_deviation_db : float
        The worst build's largest deviation of the sum from the nominal over the band, in dB.
    worst_at_hz : float
        Where that deviation is, in Hz.
    worst_factors : ndarray
        The worst build's factors on the nominal values (dimensionless), shape (P,).
    pair_p50_db, pair_p95_db : float
        The median and 95th percentile of the largest difference over the band between two builds' sums, in dB.
    sensitivity : list of dict
        Each part's sensitivity, the most sensitive first: ``part``, ``db_per_pct`` (dB per +1 % of its value,
        its worst over the band), ``worst_at_hz`` (Hz), ``at_crossover`` (dB per +1 % at each crossover
        frequency, keyed by the frequency's text) and ``tolerance_pct`` (%).
    corners : dict
        The worst-case corner (:func:`worst_corners`): ``method``, ``worst_deviation_db`` (dB) and ``signs``
        (part name -> "+" or "-").
    tolerances : ndarray
        Each part's tolerance as a fraction (dimensionless), shape (P,).
    """

    samples: int
    nominal_db: np.ndarray  # (C, F): sum then each driver
    p05: np.ndarray
    p50: np.ndarray
    p95: np.ndarray
    yield_band: float
    yield_limits: float
    limits: dict
    worst_deviation_db: float
    worst_at_hz: float
    worst_factors: np.ndarray  # (P,)
    pair_p50_db: float
    pair_p95_db: float
    sensitivity: list
    corners: dict
    tolerances: np.ndarray


def sensitivities(system, nominal: np.ndarray) -> np.ndarray:
    """The change of the sum's level per +1 % of each part's value, by central differences of +-SENS_STEP.

    The sum is the curve the system target applies to (:meth:`~xo_fit.model.system.System.reference_db`: the
    on-axis sum, or the listening window where ``[target] reference`` names it).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    nominal : ndarray
        The design's part values, SI (ohm, H, F), shape (P,).

    Returns
    -------
    ndarray
        d(level)/d(+1 % of the part), in dB per percent, shape (P, F).
    """
    p = nominal.size
    v = np.repeat(nominal[None, :], 2 * p, axis=0)
    for i in range(p):
        v[2 * i, i] *= 1 + SENS_STEP
        v[2 * i + 1, i] *= 1 - SENS_STEP
    sim = system.simulate(v)
    db = system.reference_db(sim)
    return (db[0::2] - db[1::2]) / 2.0 * (0.01 / SENS_STEP)


def batch_size(system) -> int:
    """Designs solved at a time: CHUNK, fewer on a large grid.

    A batch holds at most CHUNK_VALUES complex values, counting per design the sum, each driver's voltage and
    level and, off axis, each driver at each position.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).

    Returns
    -------
    int
        Designs per batch (dimensionless), 1..CHUNK.
    """
    d = len(system.job.drivers)
    per_design = system.frequencies.size * (1 + d * (2 + len(system.positions)))
    return int(np.clip(CHUNK_VALUES // per_design, 1, CHUNK))


def run_spread(system, nominal: np.ndarray, *, samples: int | None = None, seed: int | None = None,
               distribution: str | None = None, qmc: bool | None = None, rms_limit_db: float | None = None,
               crossovers: list[float] | None = None, progress=None) -> SpreadResult:
    """Monte Carlo, sensitivity, worst cases and pair matching of one design (see the module).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    nominal : ndarray
        The design's part values, SI (ohm, H, F), shape (P,).
    samples : int, optional
        Builds to draw (dimensionless); default the job's ``[spread] samples``.
    seed : int, optional
        The random seed (dimensionless); default the job's ``[spread] seed``.
    distribution : str, optional
        ``"uniform"`` or ``"normal"``; default the job's ``[spread] distribution``.
    qmc : bool, optional
        Draw from scrambled Sobol points; default the job's ``[spread] qmc``.
    rms_limit_db : float, optional
        The rms error a build may have against the target to count in ``yield_limits``, in dB; default the job's
        ``[spread] rms_limit_db``.
    crossovers : list of float, optional
        The frequencies the sensitivity is also given at, in Hz; default the way targets' fc, fc_low and fc_high.
    progress : callable, optional
        Called as ``progress(done, samples, fraction_within_band)`` after each batch of builds.

    Returns
    -------
    SpreadResult
        The percentiles, yields, worst build, pair matching, sensitivities and worst corner.

    Raises
    ------
    JobError
        Where the draws (samples x parts, 8 bytes each) would take more than DRAWS_BYTES.
    """
    from xo_fit.grid import band_mask

    job = system.job
    spec = job.spread
    samples = spec.samples if samples is None else samples
    seed = spec.seed if seed is None else seed
    distribution = spec.distribution if distribution is None else distribution
    qmc = spec.qmc if qmc is None else qmc
    rms_limit = spec.rms_limit_db if rms_limit_db is None else rms_limit_db
    f = system.frequencies
    band = band_mask(f, job.target.band)
    tol = part_tolerances(job)
    nominal = np.asarray(nominal, dtype=float)
    _check_draws(job, samples, tol)
    nom = system.simulate(nominal)
    nom_db = np.concatenate([system.reference_db(nom), spl_db(nom.pressure[0])], axis=0)  # (C, F)
    hist = _Hist(nom_db.shape[0], f.size)
    target_db = _target_db(system)
    floor = job.cost.impedance_min
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    factors = draw_factors(samples, tol, distribution, rng, qmc)
    within = meeting = 0
    worst: tuple[float, float, np.ndarray | None] = (-1.0, 0.0, None)  # deviation dB, where Hz, factors (P,)
    pair_diffs = []
    carry = None
    chunk = batch_size(system)
    for lo in range(0, samples, chunk):
        fac = factors[lo:lo + chunk]
        sim = system.simulate(nominal[None, :] * fac)
        db = np.concatenate([system.reference_db(sim)[:, None, :], spl_db(sim.pressure)], axis=1)  # (B, C, F)
        dev = db - nom_db[None]
        hist.add(dev)
        sdev = np.abs(dev[:, 0, band])
        mx = sdev.max(axis=1)
        within += int(np.count_nonzero(mx <= spec.band_db))
        i = int(np.argmax(mx))
        if mx[i] > worst[0]:
            worst = (float(mx[i]), float(f[band][np.argmax(sdev[i])]), fac[i].copy())
        ok = np.ones(fac.shape[0], dtype=bool)
        if target_db is not None:
            err = db[:, 0, band] - target_db[band]
            err = err - err.mean(axis=1, keepdims=True)  # at each build's own best level
            ok &= np.sqrt(np.mean(err**2, axis=1)) <= rms_limit
        if floor > 0:
            ok &= np.abs(sim.impedance[:, band]).min(axis=1) >= floor
        meeting += int(np.count_nonzero(ok))
        sums = db[:, 0, band]
        if carry is not None:
            sums = np.vstack([carry, sums])
            carry = None
        if sums.shape[0] % 2:
            carry, sums = sums[-1:], sums[:-1]
        if sums.shape[0]:
            pair_diffs.append(np.abs(sums[0::2] - sums[1::2]).max(axis=1))
        if progress is not None:
            progress(min(lo + chunk, samples), samples, within / min(lo + chunk, samples))
    pairs = np.concatenate(pair_diffs) if pair_diffs else np.zeros(1)
    sens = sensitivities(system, nominal)
    ranking = _ranking(system, sens, band, tol, crossovers if crossovers is not None else _crossovers(job))
    corners = worst_corners(system, nominal, tol, sens, band, nom_db[0])
    assert worst[2] is not None, "some build has a finite deviation"
    return SpreadResult(
        samples=samples, nominal_db=nom_db, p05=nom_db + hist.percentile(5), p50=nom_db + hist.percentile(50),
        p95=nom_db + hist.percentile(95), yield_band=within / samples, yield_limits=meeting / samples,
        limits={"band_db": spec.band_db, "rms_error_db": rms_limit, "impedance_min_ohm": floor},
        worst_deviation_db=worst[0], worst_at_hz=worst[1], worst_factors=worst[2],
        pair_p50_db=float(np.percentile(pairs, 50)), pair_p95_db=float(np.percentile(pairs, 95)),
        sensitivity=ranking, corners=corners, tolerances=tol)


def _check_draws(job, samples: int, tol: np.ndarray) -> None:
    """The tolerance draws (samples x parts, 8 bytes each) are made up front: refuse more than DRAWS_BYTES."""
    if samples * max(tol.size, 1) * 8 > DRAWS_BYTES:
        from xo_fit.errors import JobError

        raise JobError(f"{samples} tolerance draws of {tol.size} parts need {samples * tol.size * 8 / 2**30:.1f} GiB; "
                       f"at most {DRAWS_BYTES // 2**30} GiB ({DRAWS_BYTES // (8 * max(tol.size, 1)):,} draws of "
                       f"{tol.size} parts)", path=job.path, key="[spread] samples (or --samples)")


def _ranking(system, sens: np.ndarray, band: np.ndarray, tol: np.ndarray, xo: list[float]) -> list[dict]:
    """Each part's sensitivity (dB per +1 %, sens (P, F)): its worst in the band and where, its value at each
    crossover frequency ``xo`` (Hz) and its tolerance; the most sensitive first."""
    f = system.frequencies
    ranking = []
    for i, name in enumerate(system.part_names):
        s_band = sens[i, band]
        k = int(np.argmax(np.abs(s_band)))
        at = {f"{fc:g}": float(np.interp(np.log(fc), np.log(f), sens[i])) for fc in xo}
        ranking.append({"part": name, "db_per_pct": float(s_band[k]), "worst_at_hz": float(f[band][k]),
                        "at_crossover": at, "tolerance_pct": float(tol[i] * 100)})
    ranking.sort(key=lambda r: -abs(r["db_per_pct"]))
    return ranking


def worst_corners(system, nominal, tol, sens, band, nominal_sum_db) -> dict:
    """The worst corner: every toleranced part at + or - its tolerance, the sum furthest from the nominal.

    Up to CORNERS_MAX toleranced parts every one of the 2^n corners is solved; above, the two corners the signs of
    the sensitivities point to, at the frequency where the first-order worst case is largest.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    nominal : ndarray
        The design's part values, SI (ohm, H, F), shape (P,).
    tol : ndarray
        Each part's tolerance as a fraction (dimensionless), shape (P,).
    sens : ndarray
        The sensitivities (:func:`sensitivities`), in dB per percent, shape (P, F).
    band : ndarray
        The target band as a mask of the grid, bool, shape (F,).
    nominal_sum_db : ndarray
        The nominal design's sum, in dB SPL, shape (F,).

    Returns
    -------
    dict
        ``method`` (how the corners were chosen, or "none" without toleranced parts), ``worst_deviation_db`` (the
        worst corner's largest deviation from the nominal over the band, in dB) and ``signs`` (part name -> "+"
        or "-", each toleranced part's side in that corner).
    """
    idx = np.nonzero(tol > 0)[0]
    if idx.size == 0:
        return {"method": "none", "worst_deviation_db": 0.0, "signs": {}}
    if idx.size <= CORNERS_MAX:
        signs = np.array(np.meshgrid(*[[-1.0, 1.0]] * idx.size, indexing="ij")).reshape(idx.size, -1).T
        method = f"all {signs.shape[0]} corners"
    else:
        # the frequency where the first-order worst case is largest; the signs of the sensitivities there
        total = np.abs(sens[idx][:, band] * (tol[idx, None] * 100)).sum(axis=0)
        k = int(np.argmax(total))
        s = np.sign(sens[idx][:, band][:, k])
        s[s == 0] = 1.0
        signs = np.vstack([s, -s])
        method = "the two corners the sensitivities point to"
    vals = np.repeat(nominal[None, :], signs.shape[0], axis=0)
    vals[:, idx] *= 1 + signs * tol[idx][None, :]
    dev_max = np.zeros(signs.shape[0])
    chunk = batch_size(system)
    for lo in range(0, signs.shape[0], chunk):
        sim = system.simulate(vals[lo:lo + chunk])
        dev_max[lo:lo + chunk] = np.abs(system.reference_db(sim)[:, band] - nominal_sum_db[band]).max(axis=1)
    w = int(np.argmax(dev_max))
    names = system.part_names
    return {"method": method, "worst_deviation_db": float(dev_max[w]),
            "signs": {names[i]: ("+" if signs[w, j] > 0 else "-") for j, i in enumerate(idx)}}


def _target_db(system) -> np.ndarray | None:
    if not system.job.target.ways:
        return None
    from xo_fit.model.targets import build_targets

    t = build_targets(system.job, system.frequencies)
    return 20 * np.log10(np.abs(t.system))


def _crossovers(job) -> list[float]:
    """Crossover frequencies of the job's way targets (fc, fc_low, fc_high), unique and sorted."""
    out = set()
    for w in job.target.ways:
        for x in (w.fc, w.fc_low, w.fc_high):
            if x:
                out.add(float(x))
    return sorted(out)
