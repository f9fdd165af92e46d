"""Sphinx configuration of the bucksim documentation.

Build with ``python -m sphinx -W -b html docs docs/_build/html`` from the project folder
(warnings are errors). The Markdown pages are read by MyST; the tutorial notebooks in
``notebooks/`` are rendered by myst-nb as they are committed (outputs stripped), never
executed here: ``tests/system/test_notebooks.py`` executes them.
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

DOCS = Path(__file__).resolve().parent
ROOT = DOCS.parent
sys.path.insert(0, str(ROOT))  # document this checkout's package, installed or not

# -- project -----------------------------------------------------------------------------

project = "bucksim"
author = "bucksim developers"
copyright = "2026, bucksim developers"
try:
    from importlib.metadata import version as _version

    release = _version("bucksim")
except Exception:  # a source tree that was never installed
    release = "0.0.0+source"
version = release

# -- the tutorial notebooks ---------------------------------------------------------------
# Sphinx reads only files inside its source folder, and myst-nb has no way to point a
# toctree at a folder outside it, so the committed notebooks are copied into
# docs/tutorials/ (ignored by git, see docs/.gitignore) before the build. A copy is
# rewritten only when its content changed, and atomically (os.replace), so two builds
# running at once never read a half-written notebook.

NOTEBOOK_SOURCE = ROOT / "notebooks"
NOTEBOOK_COPY = DOCS / "tutorials"


def _copy_notebooks() -> None:
    NOTEBOOK_COPY.mkdir(exist_ok=True)
    wanted = {p.name for p in NOTEBOOK_SOURCE.glob("*.ipynb")}
    for stale in NOTEBOOK_COPY.glob("*.ipynb"):
        if stale.name not in wanted:
            stale.unlink()
    for name in sorted(wanted):
        src, dst = NOTEBOOK_SOURCE / name, NOTEBOOK_COPY / name
        data = src.read_bytes()
        if dst.is_file() and dst.read_bytes() == data:
            continue
        fd, tmp = tempfile.mkstemp(dir=NOTEBOOK_COPY, prefix=f".{name}.", suffix=".partial")
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.replace(tmp, dst)


_copy_notebooks()

# -- extensions --------------------------------------------------------------------------

extensions = [
    "myst_nb",  # Markdown pages (MyST) and notebooks
    "sphinx.ext.autodoc",
    "sphinx.ext.autosummary",
    "sphinx.ext.mathjax",
    "numpydoc",
]

source_suffix = {".md": "myst-nb", ".ipynb": "myst-nb", ".rst": "restructuredtext"}
root_doc = "index"
exclude_patterns = ["_build", "**/.ipynb_checkpoints", "**/*.partial", ".gitignore"]

# MyST: $...$ and $$...$$ maths, anchors for headings down to ### so that pages can link
# to each other's sections (``scenario-reference.md#run``).
myst_enable_extensions = ["dollarmath", "amsmath", "colon_fence", "deflist"]
myst_heading_anchors = 3

# myst-nb: render the notebooks as committed; the test suite executes them.
nb_execution_mode = "off"

# autodoc / autosummary: the public API is documented from the docstrings of the top-level
# ``bucksim`` namespace. The engine (numba) is imported lazily by the package itself, so
# importing it here costs no compilation.
autosummary_generate = False
autodoc_default_options = {"members": False}
autodoc_typehints = "none"  # numpydoc writes the types from the docstrings

# A docstring that writes a modulus as ``|Floquet multiplier|`` (bucksim.crosscheck) reads
# as a reStructuredText substitution; this definition prints it as written. It applies to
# the .rst pages, where the API reference is (MyST pages do not read rst_prolog).
rst_prolog = r"""
.. |Floquet multiplier| replace:: \|Floquet multiplier\|
"""

# numpydoc: no member tables of classes (they would need stub pages for every method), and
# no validation of docstrings beyond what Sphinx itself reports.
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False
numpydoc_xref_param_type = False

# -- HTML ----------------------------------------------------------------------------------

html_theme = "alabaster"
html_title = f"bucksim {release}"
html_theme_options = {
    "description": "Exact cycle-by-cycle simulation of buck converter power stages",
    "fixed_sidebar": False,
    "show_relbars": True,
}
html_static_path: list[str] = []
html_show_sourcelink = False
