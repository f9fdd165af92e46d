"""Lint and types: ``ruff check`` and ``mypy`` pass, run as ``.ci/run`` runs the suite.

Both run in a subprocess from the repository root with the configuration in
``pyproject.toml`` (``[tool.ruff]``, ``[tool.mypy]``), so the README's one test
command covers them as it covers the docs build (tests/system/test_docs_build.py).
Neither is skipped when missing: both are in the ``test`` extra.

* ruff over the package, the tests, the benchmarks and the tools; the rule
  families the project keeps (DEVELOPERS.md, "Lint, types and docs"): pyflakes
  (F), pycodestyle (E, W), import order (I), pyupgrade (UP), bugbear (B), and
  RUF100 so that no ``# noqa`` outlives what it silenced.
* mypy over the public API: the files listed in ``[tool.mypy] files``
  (``bucksim/__init__.py`` and what its ``__all__`` exposes from the model, the
  errors and the command line).
"""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
LINT_PATHS = ("bucksim", "tests", "benchmarks", "tools")
RULES = {"F", "E", "W", "I", "UP", "B", "RUF100"}
TIMEOUT = 600  # s, a loaded two-core machine; each takes seconds when idle


def _run(args, tmp_path):
    env = dict(os.environ, MYPY_CACHE_DIR=str(tmp_path / "mypy"),
               RUFF_CACHE_DIR=str(tmp_path / "ruff"))
    return subprocess.run([sys.executable, "-m", *args], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=TIMEOUT,
                          stdin=subprocess.DEVNULL, check=False)


def _pyproject():
    return tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))


def test_configuration_keeps_the_rules():
    tool = _pyproject()["tool"]
    assert set(tool["ruff"]["lint"]["select"]) >= RULES
    assert tool["ruff"]["line-length"] == 100 and tool["ruff"]["target-version"] == "py311"
    files = tool["mypy"]["files"]
    for public in ("bucksim/__init__.py", "bucksim/errors.py", "bucksim/model/parts.py",
                   "bucksim/model/scenario.py", "bucksim/model/units.py", "bucksim/cli"):
        assert public in files
    test_extra = " ".join(_pyproject()["project"]["optional-dependencies"]["test"])
    assert "ruff" in test_extra and "mypy" in test_extra


def test_ruff_check_is_clean(tmp_path):
    proc = _run(["ruff", "check", "--no-cache", "--output-format", "concise", *LINT_PATHS],
                tmp_path)
    assert proc.returncode == 0, f"ruff check found:\n{proc.stdout[-8000:]}{proc.stderr[-2000:]}"


def test_mypy_on_the_public_api_is_clean(tmp_path):
    proc = _run(["mypy", "--cache-dir", str(tmp_path / "mypy")], tmp_path)
    assert proc.returncode == 0, f"mypy found:\n{proc.stdout[-8000:]}{proc.stderr[-2000:]}"
    assert "Success: no issues found" in proc.stdout
