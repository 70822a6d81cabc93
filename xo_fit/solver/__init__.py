"""The pure solver: the netlist, its dense reference solve, generated and compiled kernels, the fused cost.

Nothing here knows of jobs or files: a :class:`~xo_fit.solver.network.Network`
is built from branches, a grid and driver impedances, and solved for batches
of part values.
"""
