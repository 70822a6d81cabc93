"""Every tunable of the search and the stages, in one place: the knobs that trade time for thoroughness.

What a user sets per job lives in the job's tables (their defaults on the fields of :mod:`xo_fit.job.model`'s
dataclasses, by table and key in :data:`~xo_fit.job.model.DEFAULTS`);
physical and format constants live in :mod:`xo_fit.constants` and beside the models that define them. The
values here are chosen by measurement (``benchmarks/``); changing one changes results, so each says what it
does and what it trades.
"""

from __future__ import annotations

# ----------------------------------------------------------------------------- search (xo_fit.search.engines)

#: The population has converged when its costs agree to this relative spread (and its points to 1e-6).
CONVERGED = 1e-12
#: A restart is due when the best cost has improved by less than STAGNATION_TOL (relative) over this many
#: generations (measured on the demo and the three-ways: JADE's runs reach 0.1 % of their final cost after
#: 7,000-9,500 of 17,000 evaluations and then only refine).
STAGNATION = 30
STAGNATION_TOL = 1e-3
#: Each restart's population is this many times the last one's (IPOP), up to MAX_POPULATION.
RESTART_GROWTH = 2
MAX_POPULATION = 256
#: The polish starts from the best of this many distinct basins, and keeps the best result.
POLISH_BASINS = 3
#: Share of the budget the polish may use at most.
POLISH_SHARE = 0.15
#: Forward-difference step of the polish in u (normalised log) space.
POLISH_STEP = 1e-6
#: The polish stops when a step improves the cost by less than this fraction (scipy's ftol) ...
POLISH_FTOL = 1e-10
#: ... or the projected gradient (cost per unit of u) falls below this.
POLISH_GTOL = 1e-8

# ----------------------------------------------------------------------------- batches of designs

#: Designs solved per batch by the snap's search and the tolerance spread (memory: B x F x parts), at most ...
CHUNK = 2048
#: ... and at most this many complex values per batch of the spread (2^25: 512 MiB an array), counting per
#: design every curve, driver and (off axis) position at every grid point: a large grid solves fewer at a time.
CHUNK_VALUES = 2**25

# ------------------------------------------------------------- snap (xo_fit.stages: snapping, choices, choice_search)

#: Purchasable values on each side of the nearest one that a part may take.
NEIGHBOURS = 2
#: Up to this many complete combinations are searched exhaustively.
EXHAUSTIVE = 50_000
#: Beam width of the heuristic search, and its random restarts.
BEAM = 24
RESTARTS = 4
#: Two-part combinations kept per part (the closest to its value).
PAIRS_PER_PART = 4
#: A snapped value this many E12 steps or more from its continuous value is called out (common practice:
#: a step or two is the rounding a series costs; more means the series or the drawer lacks the value).
FAR_STEPS = 2
#: A snap that raises the cost by more than this fraction of the continuous cost is called out.
FAR_COST = 0.5

# ----------------------------------------------------------------------------- spread (xo_fit.stages.tolerance)

#: Histogram of level deviations from nominal: bin width and range (dB) ...
HIST_STEP_DB = 0.01
HIST_RANGE_DB = 30.0
#: ... and its largest size (bytes, int32 counts): on a grid whose curves x points x 6,001 bins would exceed it,
#: the bins widen to fit (at 100,000 points and three curves: 223 bins of 0.27 dB; percentiles exact to half a bin).
HIST_BYTES = 256 * 2**20
#: The tolerance draws (samples x parts, 8 bytes each) are made up front: at most this many bytes of them.
DRAWS_BYTES = 2 * 2**30
#: Up to this many toleranced parts, every corner is evaluated.
CORNERS_MAX = 12
#: Relative step of the sensitivity's central difference (1 %).
SENS_STEP = 0.01

# ----------------------------------------------------------------------------- prune (xo_fit.stages.pruning)

#: Refit budget (cost evaluations) when none is given: the most a prune's refit (a polish from the current values)
#: may spend; on the hard three-way 300 reached the costs a 4,000-evaluation search does (DEVELOPERS.md, Prune).
REFIT_BUDGET = 300
#: Default largest cost increase over step 0 for the chosen design (a fraction: 0.10 is 10 %).
MAX_INCREASE = 0.10
#: A removal that changes the cost by less than this share of it marks the part as negligible.
NEGLIGIBLE = 0.01
#: ... of it, or of this cost (dB^2: about 0.03 dB rms) for a design that meets its target to within rounding.
COST_FLOOR = 1e-3
