"""Test-session set-up shared by all test modules."""

import os
import sys

# Small-matrix LAPACK calls (expm of 3 x 3) run several times slower when
# OpenBLAS threads them on a loaded two-core machine; the tests make many.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MPLBACKEND", "Agg")

# tests import the independent reference solver as a plain module
sys.path.insert(0, os.path.dirname(__file__))
