"""xo_fit: fit passive loudspeaker crossover part values to measured drivers and an acoustic target.

The Python API (see docs/api.md)::

    import xo_fit
    job = xo_fit.load_job("job.toml")
    best = xo_fit.fit(job, budget=20000, seed=1)
    buy = xo_fit.snap(job, best)
    tol = xo_fit.spread(job, buy, samples=2000, seed=1)
    xo_fit.write_report([best, buy, tol], "out/report")

Importing the package stays light: numba, matplotlib, nevergrad and dask load
only when something needs them (the API's names are imported on first use).
"""

from xo_fit.errors import XoFitError

__version__ = "0.2.0"

_API = ("load_job", "simulate", "fit", "snap", "spread", "prune", "write_report", "load_result", "fit_driver", "baffle",
        "Design", "Spread")
__all__ = ["XoFitError", "__version__", *_API]


def __getattr__(name: str):
    if name in _API:
        from xo_fit import api

        return getattr(api, name)
    raise AttributeError(f"module 'xo_fit' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
