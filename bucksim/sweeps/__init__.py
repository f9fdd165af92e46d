"""Parameter and Monte Carlo sweeps (the package behind :func:`bucksim.sweep`).

Plan the points (``plan``), execute them in process, in a pool of processes or
on Dask (``execute``), collect the table (``table``); the CSV progress file and resume checks
(``files``).
"""
