"""xo_fit: fit passive loudspeaker crossover part values to measured drivers and an acoustic target.

Importing the package stays light: numba, matplotlib, nevergrad and dask load
only when a command needs them.
"""

from .errors import XoFitError

__version__ = "0.1.0"
__all__ = ["XoFitError", "__version__"]
