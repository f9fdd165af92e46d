"""Test-session set-up shared by all test modules."""

import atexit
import os
import shutil
import tempfile

# Small-matrix LAPACK calls (expm of 3 x 3) run several times slower when
# OpenBLAS threads them on a loaded two-core machine; the tests make many.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MPLBACKEND", "Agg")

# Hypothesis keeps example patches and the constants it collects from the
# loaded modules in its storage directory; a suite whose draws depend on what
# an earlier run left there is not the same suite on every machine. Each
# session gets a fresh, empty one (unless the caller chose a directory).
if "HYPOTHESIS_STORAGE_DIRECTORY" not in os.environ:
    _hypothesis_dir = tempfile.mkdtemp(prefix="bucksim-hypothesis-")
    os.environ["HYPOTHESIS_STORAGE_DIRECTORY"] = _hypothesis_dir
    atexit.register(shutil.rmtree, _hypothesis_dir, ignore_errors=True)

