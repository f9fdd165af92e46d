"""Parameter and Monte Carlo sweeps (the package behind :func:`bucksim.sweep`): plan the points, execute them (in process, a pool or
Dask) and collect the table."""
