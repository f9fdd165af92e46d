"""The command's start: what ``bucksim --help`` and ``import bucksim`` load, the lazy public
names, and the one-line notice when numba compiles kernels (issue 15, a quick first run).

Which modules a fresh interpreter loads is read from ``sys.modules`` in a subprocess; no
test times anything (the figures are in ``benchmarks/bench_cli.py``).
"""

from __future__ import annotations

import json
import re
import subprocess
import sys

import pytest
from numba import njit

import bucksim
from bucksim.cli import cache
from bucksim.cli.main import main

HEAVY = ("numba", "scipy", "h5py", "matplotlib", "bucksim.engine.cycles", "bucksim.simulation")
NOTICE = re.compile(r"^bucksim: compiling kernels once, about \d+ s$")


def loaded_after(code: str) -> set[str]:
    """Top-level names and bucksim modules in ``sys.modules`` after ``code`` runs in a new
    interpreter."""
    probe = (f"import sys, json\n{code}\n"
             "print(json.dumps(sorted(sys.modules)))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                         check=True, timeout=120)
    names = json.loads(out.stdout.strip().splitlines()[-1])
    return {n for n in names if n.startswith("bucksim")} | {n.split(".")[0] for n in names}


@pytest.mark.parametrize("argv", [["--help"], ["run", "--help"], ["sweep", "--help"],
                                  ["--version"]])
def test_help_loads_no_engine(argv):
    loaded = loaded_after("from bucksim.cli.main import main\n"
                          f"try:\n    main({argv!r})\nexcept SystemExit:\n    pass")
    assert "bucksim.cli.main" in loaded                 # the probe did run the parser
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


def test_import_loads_neither_numpy_nor_engine():
    loaded = loaded_after("import bucksim")
    assert "bucksim" in loaded
    assert not loaded & {"numpy", *HEAVY}, sorted(loaded & {"numpy", *HEAVY})


def test_lazy_public_names_are_the_real_objects():
    from bucksim.analysis.budget import estimate
    from bucksim.analysis.crosscheck import crosscheck
    from bucksim.studies.compare import compare
    from bucksim.studies.reverse import reverse_current
    from bucksim.sweeps.plan import sweep
    from bucksim.waveforms import Run

    real = {"estimate": estimate, "crosscheck": crosscheck, "compare": compare,
            "reverse_current": reverse_current, "sweep": sweep, "Run": Run}
    for name, obj in real.items():
        assert getattr(bucksim, name) is obj
    assert set(bucksim.__all__) <= set(dir(bucksim))
    namespace: dict = {}
    exec("from bucksim import *", namespace)
    assert namespace["estimate"] is estimate
    with pytest.raises(AttributeError, match="no attribute 'not_a_name'"):
        bucksim.not_a_name  # noqa: B018


def _fresh_bucksim_kernel():
    """A new dispatcher of one of bucksim's kernels, uncached: calling it compiles."""
    from bucksim.engine import propagation
    return njit(cache=False)(propagation.derivative.py_func)


def test_notice_once_when_a_kernel_compiles(capsys):
    import numpy as np

    kernel = _fresh_bucksim_kernel()
    Ms, z = np.eye(3)[None].copy(), np.array([1.0, 2.0, 1.0])
    with cache.compile_notice():
        assert kernel(Ms, 0, z, 1) == 2.0
        kernel(Ms, 0, z.astype(np.float32), 1)   # a second compilation: no second line
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and NOTICE.match(err[0]), err


def test_no_notice_without_compiling(capsys):
    import numpy as np

    kernel = _fresh_bucksim_kernel()
    Ms, z = np.eye(3)[None].copy(), np.ones(3)
    kernel(Ms, 0, z, 0)                          # compiled before the notice is armed

    @njit(cache=False)
    def not_ours(x):                             # a compilation outside bucksim's kernels
        return x + 1

    with cache.compile_notice():
        kernel(Ms, 0, z, 2)
        assert not_ours(1) == 2
    with cache.compile_notice(active=False):
        _fresh_bucksim_kernel()(Ms, 0, z, 0)
    assert capsys.readouterr().err == ""


def test_warm_run_prints_no_notice(capsys):
    argv = ["run", "--cycles", "20", "--quiet", "--json"]
    assert main(argv) == 0                       # may compile (a cold cache): a notice
    first = capsys.readouterr()
    assert all(NOTICE.match(line) for line in first.err.splitlines() if "compiling" in line)
    assert main(argv) == 0                       # every kernel loaded now
    second = capsys.readouterr()
    assert "compiling" not in second.err
    assert json.loads(second.out) == json.loads(first.out)


def test_user_cache_folders_match_numba():
    """The folders ``bucksim cache clear`` empties under NUMBA_CACHE_DIR are the ones numba
    writes (its own locator names them)."""
    from numba.core.caching import UserProvidedCacheLocator

    import bucksim.engine.cycles as cycles

    expected = UserProvidedCacheLocator.get_suitable_cache_subpath(cycles.__file__)
    names = {p.name for p in cache.user_cache_folders("/somewhere")}
    assert expected in names
    assert all(str(p).startswith("/somewhere/") for p in cache.user_cache_folders("/somewhere"))
