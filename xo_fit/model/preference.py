"""S. E. Olive's predicted listener preference from the ANSI/CTA-2034-A curves.

The model (S. E. Olive, "A multiple regression model for predicting loudspeaker preference using objective
measurements: part I / part II", AES 116th Convention, 2004, convention papers 6113 and 6190; US patent
8,311,232) predicts a preference rating from four figures of the curves:

    score = 12.69 - 2.49 NBD_ON - 2.99 NBD_PIR - 4.31 LFX + 2.32 SM_PIR

- NBD (narrow-band deviation, dB) of the on-axis curve and of the estimated in-room response (PIR): over
  the half-octave bands from 100 Hz, edges 100 * 2^(k/2) Hz, the last cut at 12 kHz (14 bands), each
  band's mean absolute difference of its grid points from their own mean; NBD is the mean over the bands.
- SM_PIR: r^2 of the least-squares straight line of the PIR (dB) on log10 f, grid points 100 Hz..16 kHz.
- LFX = log10 f_-6 (f in Hz): going down in frequency from 300 Hz, the first frequency where the sound
  power falls 6 dB under the listening window's mean level over 300 Hz..10 kHz, interpolated in log f.

``score_with_sub`` puts the LFX of an ideal subwoofer, log10(14.5 Hz) (common practice), in place of LFX.

Everything that depends on the grid alone is worked out once in a :class:`PreferencePlan` (band index
ranges, regression abscissae and their sums, the LFX reference range and search start);
:func:`evaluate` then does only sums and comparisons over the plan's index ranges, batched over leading
axes. Curves are in dB at the edge of this model (the model is defined on dB). A figure the grid (or the
measured positions) cannot give is NaN, and ``reasons`` says why in one line. docs/preference.md has the
equations, the choices and the sources.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from xo_fit.model.cta2034 import IN_ROOM_WEIGHTS

#: The regression's intercept and coefficients (Olive 2004, part II; US 8,311,232).
INTERCEPT = 12.69
COEF_NBD_ON = 2.49
COEF_NBD_PIR = 2.99
COEF_LFX = 4.31
COEF_SM_PIR = 2.32
#: The -6 dB frequency of an ideal subwoofer, Hz (common practice for ``score_with_sub``).
SUB_F6_HZ = 14.5

#: NBD's bands: from NBD_LOW_HZ in half octaves, the last one cut at NBD_HIGH_HZ.
NBD_LOW_HZ = 100.0
NBD_HIGH_HZ = 12000.0
#: SM's regression span, Hz.
SM_LOW_HZ = 100.0
SM_HIGH_HZ = 16000.0
#: LFX: the listening window's reference span, Hz; the search starts at LFX_SEARCH_HZ and goes down.
LFX_REF_LOW_HZ = 300.0
LFX_REF_HIGH_HZ = 10000.0
LFX_SEARCH_HZ = 300.0
LFX_DROP_DB = 6.0

#: A grid point within this relative distance of a span's edge counts as on it (rounding of log grids).
EDGE_RTOL = 1e-6
#: Fewest grid points a half-octave band needs (one point has no deviation to measure).
MIN_BAND_POINTS = 2
#: Fewest grid points the SM regression needs.
MIN_SM_POINTS = 3
#: A PIR whose rms deviation from its own mean over SM's span is at most this (dB) is flat: r^2 is 0/0
#: there, and SM is taken as 0.
FLAT_RMS_DB = 1e-9

#: The figures, in output order.
FIGURES = ("nbd_on", "nbd_pir", "lfx", "sm_pir", "score", "score_with_sub")


def nbd_band_edges() -> np.ndarray:
    """The edges of NBD's half-octave bands, Hz, shape (15,): 100 * 2^(k/2) for k = 0..13, then 12 kHz.

    Returns
    -------
    numpy.ndarray
        Rising band edges in Hz; band k runs from edge k to edge k + 1.
    """
    k = np.arange(15)
    edges = NBD_LOW_HZ * 2.0 ** (k / 2)
    edges[-1] = NBD_HIGH_HZ  # 100 * 2^7 = 12.8 kHz, cut at 12 kHz
    return edges


@dataclass(frozen=True)
class PreferencePlan:
    """What the model needs of a frequency grid, worked out once (see :func:`make_plan`).

    Index ranges are ``[start, stop)`` into the grid; ``reasons`` names each figure the grid cannot give
    (its ranges are then not to be used).

    Attributes
    ----------
    frequencies, log_f : ndarray
        The grid in Hz, and its log10, shape (F,).
    band_edges_hz : ndarray
        NBD's band edges in Hz, shape (B + 1,), B = 14.
    band_start, band_stop : ndarray
        Each band's index range, int, shape (B,).
    sm_start, sm_stop : int
        SM's index range.
    sm_xc : ndarray
        log10 f minus its mean over that range, shape (sm_stop - sm_start,).
    sm_sxx : float
        The sum of sm_xc**2.
    ref_start, ref_stop : int
        The index range of the listening window's LFX reference, 300 Hz..10 kHz.
    lfx_top : int
        Index of the highest grid point at or under 300 Hz, where LFX's search starts (-1: none).
    reasons : dict
        Figure -> one-line reason, for the figures the grid cannot give.
    """

    frequencies: np.ndarray
    log_f: np.ndarray
    band_edges_hz: np.ndarray
    band_start: np.ndarray
    band_stop: np.ndarray
    sm_start: int
    sm_stop: int
    sm_xc: np.ndarray
    sm_sxx: float
    ref_start: int
    ref_stop: int
    lfx_top: int
    reasons: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class Preference:
    """The model's figures for a batch of curve sets, each an array of the batch's shape (...).

    ``nbd_on``, ``nbd_pir`` (dB), ``lfx`` (log10 Hz), ``sm_pir`` (r^2, 0..1), ``score``, ``score_with_sub``;
    NaN where a figure cannot be had, and ``reasons`` maps each such figure to a one-line reason.
    """

    nbd_on: np.ndarray
    nbd_pir: np.ndarray
    lfx: np.ndarray
    sm_pir: np.ndarray
    score: np.ndarray
    score_with_sub: np.ndarray
    reasons: dict[str, str]

    def figures(self) -> dict[str, np.ndarray]:
        """The six figures by name (:data:`FIGURES` order), arrays of the batch's shape."""
        return {name: getattr(self, name) for name in FIGURES}

    def to_json(self) -> dict:
        """For a single curve set (batch shape ()): the figures as floats or None, and ``"reasons"``
        (figure -> reason) when any figure is None.

        Returns
        -------
        dict
            ``{"nbd_on": float | None, ..., "score_with_sub": float | None[, "reasons": {...}]}``.
        """
        out: dict = {}
        for name, value in self.figures().items():
            if np.ndim(value) != 0:
                raise ValueError("to_json takes the evaluation of a single curve set")
            out[name] = None if math.isnan(float(value)) else float(value)
        reasons = {k: v for k, v in self.reasons.items() if out.get(k) is None}
        if reasons:
            out["reasons"] = reasons
        return out


def _hz(f: float) -> str:
    return f"{f / 1000:g} kHz" if f >= 1000 else f"{f:.4g} Hz"


def _span(f: np.ndarray, lo: float, hi: float) -> tuple[int, int]:
    """Index range [start, stop) of the grid points in [lo, hi] (edges widened by EDGE_RTOL)."""
    return (int(np.searchsorted(f, lo * (1 - EDGE_RTOL), "left")),
            int(np.searchsorted(f, hi * (1 + EDGE_RTOL), "right")))


def _reaches(f: np.ndarray, lo: float, hi: float) -> bool:
    return f[0] <= lo * (1 + EDGE_RTOL) and f[-1] >= hi * (1 - EDGE_RTOL)


def _grid_text(f: np.ndarray) -> str:
    return f"the grid ({_hz(f[0])} to {_hz(f[-1])})"


def _nbd_bands(f: np.ndarray, edges: np.ndarray) -> tuple[np.ndarray, np.ndarray, str | None]:
    """NBD's band index ranges on grid ``f`` (Hz): a point on an inner edge belongs to the band above;
    the last band includes 12 kHz. Returns start (B,), stop (B,) and a reason when the grid cannot serve."""
    lo = edges[:-1] * (1 - EDGE_RTOL)
    start = np.searchsorted(f, lo, "left")
    stop = np.append(np.searchsorted(f, edges[1:-1] * (1 - EDGE_RTOL), "left"),
                     np.searchsorted(f, edges[-1] * (1 + EDGE_RTOL), "right"))
    if not _reaches(f, edges[0], edges[-1]):
        return start, stop, (f"{_grid_text(f)} does not reach {_hz(edges[0])} to {_hz(edges[-1])}, "
                             "the span of the half-octave bands")
    count = stop - start
    if count.min() < MIN_BAND_POINTS:
        k = int(np.argmin(count))
        return start, stop, (f"the half-octave band {_hz(edges[k])} to {_hz(edges[k + 1])} holds "
                             f"{count[k]} grid point(s), {MIN_BAND_POINTS} needed: the grid is too coarse")
    return start, stop, None


def make_plan(frequencies: np.ndarray) -> PreferencePlan:
    """Work out once what :func:`evaluate` needs of a frequency grid.

    Parameters
    ----------
    frequencies : ndarray
        The grid, in Hz, shape (F,), positive and strictly rising.

    Returns
    -------
    PreferencePlan
        Band index ranges, the SM regression's centred abscissae and their sum of squares, the LFX
        reference range and search start, and a reason for each figure the grid cannot give.
    """
    f = np.asarray(frequencies, dtype=float)
    if f.ndim != 1 or f.size < 2 or not np.all(np.isfinite(f)) or f[0] <= 0 or np.any(np.diff(f) <= 0):
        raise ValueError("frequencies must be a positive, strictly rising 1-D grid of at least 2 points")
    log_f = np.log10(f)
    reasons: dict[str, str] = {}
    edges = nbd_band_edges()
    band_start, band_stop, why = _nbd_bands(f, edges)
    if why:
        reasons["nbd_on"] = reasons["nbd_pir"] = why
    sm_start, sm_stop = _span(f, SM_LOW_HZ, SM_HIGH_HZ)
    if not _reaches(f, SM_LOW_HZ, SM_HIGH_HZ):
        reasons["sm_pir"] = f"{_grid_text(f)} does not reach {_hz(SM_LOW_HZ)} to {_hz(SM_HIGH_HZ)}, SM's span"
    elif sm_stop - sm_start < MIN_SM_POINTS:
        reasons["sm_pir"] = f"SM's span holds {sm_stop - sm_start} grid point(s), {MIN_SM_POINTS} needed"
    x = log_f[sm_start:sm_stop]
    sm_xc = x - x.mean() if x.size else x
    ref_start, ref_stop = _span(f, LFX_REF_LOW_HZ, LFX_REF_HIGH_HZ)
    lfx_top = int(np.searchsorted(f, LFX_SEARCH_HZ * (1 + EDGE_RTOL), "right")) - 1
    if not _reaches(f, LFX_REF_LOW_HZ, LFX_REF_HIGH_HZ):
        reasons["lfx"] = (f"{_grid_text(f)} does not reach {_hz(LFX_REF_LOW_HZ)} to {_hz(LFX_REF_HIGH_HZ)}, "
                          "the listening window's reference span")
    return PreferencePlan(f, log_f, edges, band_start, band_stop, sm_start, sm_stop, sm_xc,
                          float(np.sum(sm_xc * sm_xc)), ref_start, ref_stop, lfx_top, reasons)


def in_room_db(lw_db: np.ndarray, er_db: np.ndarray, sp_db: np.ndarray) -> np.ndarray:
    """The estimated in-room response, dB, (..., F): 0.12 LW + 0.44 ER + 0.44 SP in squared pressure.

    Parameters
    ----------
    lw_db, er_db, sp_db : ndarray
        Listening window, early reflections and sound power, in dB, broadcastable shapes (..., F).

    Returns
    -------
    ndarray
        The estimated in-room response, in dB, shape (..., F).
    """
    a, b, c = IN_ROOM_WEIGHTS
    p2 = (a * 10.0 ** (np.asarray(lw_db) / 10) + b * 10.0 ** (np.asarray(er_db) / 10)
          + c * 10.0 ** (np.asarray(sp_db) / 10))
    return 10.0 * np.log10(p2)


def nbd(plan: PreferencePlan, y_db: np.ndarray) -> np.ndarray:
    """Narrow-band deviation, dB, (...): the mean over NBD's bands of each band's mean absolute difference
    of its grid points from their own mean. ``y_db``: a curve in dB, (..., F)."""
    total = np.zeros(np.shape(y_db)[:-1])
    for s, e in zip(plan.band_start, plan.band_stop):
        seg = y_db[..., s:e]
        total = total + np.mean(np.abs(seg - np.mean(seg, axis=-1, keepdims=True)), axis=-1)
    return total / plan.band_start.size


def smoothness(plan: PreferencePlan, y_db: np.ndarray) -> np.ndarray:
    """SM, (...): r^2 of the least-squares line of ``y_db`` (dB, (..., F)) on log10 f over SM's span;
    0 for a curve flat within FLAT_RMS_DB there (r^2 is 0/0)."""
    seg = y_db[..., plan.sm_start:plan.sm_stop]
    d = seg - np.mean(seg, axis=-1, keepdims=True)
    sxy = np.sum(d * plan.sm_xc, axis=-1)
    syy = np.sum(d * d, axis=-1)
    flat = syy <= seg.shape[-1] * FLAT_RMS_DB**2
    return np.where(flat, 0.0, sxy * sxy / np.where(flat, 1.0, plan.sm_sxx * syy))


def low_frequency_extension(plan: PreferencePlan, lw_db: np.ndarray, sp_db: np.ndarray, *,
                            bound: bool = False) -> np.ndarray:
    """LFX, log10 Hz, (...): going down from the highest grid point at or under 300 Hz, the first point
    where the sound power is at or under the listening window's mean (300 Hz..10 kHz) less 6 dB, the
    crossing interpolated in log f with the point above it. If that first point is the search's start,
    LFX is log10 of its frequency. Where the sound power never falls that far, NaN, or log10 of the
    grid's lowest frequency when ``bound`` (a bound, for a cost that must stay finite).

    Parameters
    ----------
    plan : PreferencePlan
        From :func:`make_plan` on the curves' grid.
    lw_db, sp_db : ndarray
        Listening window and sound power, in dB, broadcastable shapes (..., F).
    bound : bool
        Take log10 of the grid's lowest frequency instead of NaN where the sound power never falls 6 dB.

    Returns
    -------
    ndarray
        LFX, in log10 Hz, shape (...).
    """
    lw_db, sp_db = np.broadcast_arrays(lw_db, sp_db)
    top = plan.lfx_top
    threshold = np.mean(lw_db[..., plan.ref_start:plan.ref_stop], axis=-1) - LFX_DROP_DB
    below = sp_db[..., :top + 1] <= threshold[..., None]
    found = np.any(below, axis=-1)
    i = top - np.argmax(below[..., ::-1], axis=-1)  # the highest point under the threshold
    j = np.minimum(i + 1, top)  # the point above it, inside the search (over the threshold)
    s_i = np.take_along_axis(sp_db, i[..., None], axis=-1)[..., 0]
    s_j = np.take_along_axis(sp_db, j[..., None], axis=-1)[..., 0]
    step = np.where(j > i, s_j - s_i, 1.0)
    frac = np.where(j > i, (threshold - s_i) / step, 0.0)
    lfx = plan.log_f[i] + frac * (plan.log_f[j] - plan.log_f[i])
    return np.where(found, lfx, plan.log_f[0] if bound else np.nan)


def score_from(nbd_on: np.ndarray, nbd_pir: np.ndarray, lfx: np.ndarray | float, sm_pir: np.ndarray) -> np.ndarray:
    """Olive's predicted preference: 12.69 - 2.49 NBD_ON - 2.99 NBD_PIR - 4.31 LFX + 2.32 SM_PIR.

    Parameters
    ----------
    nbd_on, nbd_pir : ndarray
        Narrow-band deviations on axis and of the in-room response, in dB, broadcastable shapes (...,).
    lfx : ndarray or float
        log10 of the -6 dB frequency in Hz, shape (...,) or a number.
    sm_pir : ndarray
        The in-room response's smoothness r^2, 0..1 (dimensionless), shape (...,).

    Returns
    -------
    ndarray
        The predicted preference (dimensionless), shape (...,).
    """
    return INTERCEPT - COEF_NBD_ON * nbd_on - COEF_NBD_PIR * nbd_pir - COEF_LFX * lfx + COEF_SM_PIR * sm_pir


def _curve(x: np.ndarray, n_freq: int, name: str) -> np.ndarray:
    x = np.asarray(x, dtype=float)
    if x.ndim < 1 or x.shape[-1] != n_freq:
        raise ValueError(f"{name} must have the grid's {n_freq} points on its last axis, not shape {x.shape}")
    return x


def evaluate(plan: PreferencePlan, on_db: np.ndarray, lw_db: np.ndarray | None = None,
             er_db: np.ndarray | None = None, sp_db: np.ndarray | None = None, *,
             bound_lfx: bool = False) -> Preference:
    """Olive's figures and score for a batch of curve sets on the plan's grid.

    Parameters
    ----------
    plan : PreferencePlan
        From :func:`make_plan` on the curves' grid.
    on_db, lw_db, er_db, sp_db : ndarray or None
        On axis, listening window, early reflections and sound power, dB SPL, broadcastable shapes
        (..., F); None for a curve whose positions are not all measured (the figures needing it are NaN).
    bound_lfx : bool
        Where the sound power stays within 6 dB down to the grid's lowest point, take LFX as log10 of that
        frequency (a bound, keeping a cost finite) instead of NaN.

    Returns
    -------
    Preference
        Arrays of the batch shape (...), NaN where a figure cannot be had, with a reason for each.
    """
    n = plan.frequencies.size
    on = _curve(on_db, n, "on_db")
    lw, er, sp = (None if x is None else _curve(x, n, k)
                  for x, k in ((lw_db, "lw_db"), (er_db, "er_db"), (sp_db, "sp_db")))
    shape = np.broadcast_shapes(*(c.shape for c in (on, lw, er, sp) if c is not None))[:-1]
    nan = np.full(shape, np.nan)
    reasons = dict(plan.reasons)
    absent = [k for k, c in (("listening window", lw), ("early reflections", er), ("sound power", sp))
              if c is None]
    if absent:
        why = f"no {' or '.join(absent)} curve: its positions are not all measured"
        for k in ("nbd_pir", "sm_pir"):
            reasons.setdefault(k, why)
    if lw is None or sp is None:
        reasons.setdefault("lfx", f"no {'listening window' if lw is None else 'sound power'} curve: "
                           "its positions are not all measured")
    # a curve that is absent has put its figures in reasons above
    pir = None if lw is None or er is None or sp is None else in_room_db(lw, er, sp)
    out = {"nbd_on": nan if "nbd_on" in reasons else np.broadcast_to(nbd(plan, on), shape),
           "nbd_pir": nan if "nbd_pir" in reasons or pir is None else np.broadcast_to(nbd(plan, pir), shape),
           "sm_pir": nan if "sm_pir" in reasons or pir is None else np.broadcast_to(smoothness(plan, pir), shape)}
    lfx = nan if "lfx" in reasons or lw is None or sp is None else np.broadcast_to(
        low_frequency_extension(plan, lw, sp, bound=bound_lfx), shape)
    if "lfx" not in reasons and np.any(np.isnan(lfx)):
        count = f" ({int(np.isnan(lfx).sum())} of {lfx.size} curve sets)" if lfx.ndim else ""
        reasons["lfx"] = (f"the sound power stays within {LFX_DROP_DB:g} dB of the listening window's mean "
                          f"down to {_hz(plan.frequencies[0])}, the grid's lowest point{count}")
    out["lfx"] = lfx
    out["score"] = score_from(out["nbd_on"], out["nbd_pir"], lfx, out["sm_pir"])
    out["score_with_sub"] = score_from(out["nbd_on"], out["nbd_pir"], math.log10(SUB_F6_HZ), out["sm_pir"])
    for name, needs in (("score", ("nbd_on", "nbd_pir", "lfx", "sm_pir")),
                        ("score_with_sub", ("nbd_on", "nbd_pir", "sm_pir"))):
        missing = [k for k in needs if k in reasons]
        if missing:
            reasons[name] = f"needs {', '.join(missing)}: {reasons[missing[0]]}"
    return Preference(**{k: np.asarray(v, dtype=float) for k, v in out.items()}, reasons=reasons)


def cost_term(score: np.ndarray, weight: float) -> np.ndarray:
    """The fit's preference term: W * max(0, 10 - score)^2 / 100, (...).

    Falls as the score rises and is 0 from 10 up (an ideal speaker with an ideal subwoofer scores about 10),
    so it never rewards a score over 10; smooth (continuous first derivative) everywhere.

    Parameters
    ----------
    score : ndarray
        Predicted preference (dimensionless), shape (...,); use ``evaluate(..., bound_lfx=True)`` so it stays
        finite.
    weight : float
        W, the job's ``[cost] preference`` (dimensionless).

    Returns
    -------
    ndarray
        The term (dimensionless), shape (...,).
    """
    short = np.maximum(0.0, 10.0 - np.asarray(score, dtype=float))
    return weight * short * short / 100.0
