"""The documentation site: it builds with warnings as errors, and the README's links land.

* The Sphinx build of ``docs/`` (MyST pages, the API reference from the docstrings through
  autodoc and numpydoc, the four notebooks through myst-nb, not executed) runs in a
  subprocess exactly as ``.ci/run`` would, ``python -m sphinx -W -b html docs OUT``, into a
  temporary folder, and must exit 0 and write every page.
* Every relative link in the README names a page that exists in ``docs/`` (and, with an
  ``#anchor``, a heading of that page), and the README links to every page the site has:
  the README is the front door, the pages hold the reference.
* The habits of a published package: an MIT ``LICENSE`` whose terms are the standard text
  (the Open Source Initiative's MIT license), the ``py.typed`` marker of PEP 561 shipped as
  package data, and classifiers that say so.
"""

from __future__ import annotations

import importlib.util
import os
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
DOCS = REPO / "docs"
README = REPO / "README.md"

#: The pages of the site (the issue's list), each linked from the README.
PAGES = ("getting-started.md", "scenario-reference.md", "summary-reference.md",
         "hdf5-layout.md", "python-api.md", "api-reference.rst", "architecture.md",
         "performance.md", "validation.md", "safety.md", "tutorials.md", "input-side.md",
         "light-load.md", "light-load-modes.md")
NOTEBOOKS = ("01_first_tour", "02_strategy_for_a_rail", "03_validate_loss_budget",
             "04_sizing_the_input_capacitor")

BUILD_TIMEOUT = 600  # s: a loaded two-core machine; the build takes a few seconds when idle


# ----------------------------------------------------------------------------- the build

def test_docs_build_with_warnings_as_errors(tmp_path):
    missing = [m for m in ("sphinx", "myst_nb", "numpydoc")
               if importlib.util.find_spec(m) is None]
    assert not missing, (f"the docs build needs {', '.join(missing)}: "
                         'python -m pip install -e ".[test]"')
    out, doctrees = tmp_path / "html", tmp_path / "doctrees"
    env = dict(os.environ, MPLBACKEND="Agg", OPENBLAS_NUM_THREADS="1")
    proc = subprocess.run(
        [sys.executable, "-m", "sphinx", "-W", "--keep-going", "-b", "html",
         "-d", str(doctrees), str(DOCS), str(out)],
        cwd=REPO, env=env, capture_output=True, text=True, timeout=BUILD_TIMEOUT,
        stdin=subprocess.DEVNULL, check=False)
    assert proc.returncode == 0, (f"sphinx-build -W failed (exit {proc.returncode})\n"
                                  f"--- stderr\n{proc.stderr[-6000:]}\n"
                                  f"--- stdout\n{proc.stdout[-2000:]}")
    for page in ("index",) + tuple(Path(p).stem for p in PAGES):
        assert (out / f"{page}.html").is_file(), f"{page}.html not written"
    for name in NOTEBOOKS:
        html = out / "tutorials" / f"{name}.html"
        assert html.is_file(), f"notebook {name} not rendered"
        text = re.sub(r"<[^>]+>", "", html.read_text(encoding="utf-8"))  # highlighting spans
        assert "import bucksim" in text, f"notebook {name}: its code is not on the page"
    api = (out / "api-reference.html").read_text(encoding="utf-8")
    for name in ("simulate", "load_scenario", "steady_state", "estimate", "crosscheck",
                 "sweep", "reverse_current", "compare", "open_run", "Run", "ScenarioError",
                 "SimulationError", "StorageError"):
        assert f'id="bucksim.{name}"' in api, f"bucksim.{name} is not in the API reference"


# ----------------------------------------------------------------------------- README links

def _slug(heading: str) -> str:
    """The anchor MyST gives a heading (GitHub's rule: lower case, punctuation dropped)."""
    text = re.sub(r"[^\w\- ]", "", heading.strip().lower())
    return text.replace(" ", "-")


def _anchors(page: Path) -> set[str]:
    heads = [line.lstrip("#").strip() for line in page.read_text(encoding="utf-8").splitlines()
             if re.match(r"^#{1,3} ", line)]
    return {_slug(h) for h in heads}


def readme_links() -> list[str]:
    """Relative link targets of the README (web addresses and in-page anchors left out)."""
    text = README.read_text(encoding="utf-8")
    targets = re.findall(r"\]\(([^)\s]+)\)", text)
    return [t for t in targets if not re.match(r"^[a-z]+:", t) and not t.startswith("#")]


def test_every_readme_link_lands_on_a_docs_page():
    links = readme_links()
    assert links, "the README links to no docs page"
    for link in links:
        path, _, anchor = link.partition("#")
        target = REPO / path
        assert target.is_file(), f"README links to {link}, which does not exist"
        if target.parent == DOCS:
            assert target.name in PAGES, f"README links to {link}, not a page of the site"
        if anchor:
            assert anchor in _anchors(target), f"README links to {link}: no such heading"
    linked = {Path(link.partition("#")[0]).name for link in links
              if Path(link.partition("#")[0]).parent == Path("docs")}
    assert sorted(set(PAGES) - linked) == [], "pages the README does not link to"


def test_slug_matches_the_myst_anchor_rule():
    slugs = pytest.importorskip("myst_parser.slugs")
    for heading in ("Stored runs (HDF5 layout)", "Load profile (for compare)", "`[run]`",
                    "Quantities with SI prefixes", "A 5-minute tour"):
        assert _slug(heading) == slugs.github_slugify(heading), heading


# ----------------------------------------------------------------------------- habits

def test_license_typing_marker_and_classifiers():
    text = (REPO / "LICENSE").read_text(encoding="utf-8")
    assert text.startswith("MIT License\n")
    assert "Copyright (c) 2026 bucksim developers" in text
    # the operative sentence of the MIT license as published by the OSI
    assert ("Permission is hereby granted, free of charge, to any person obtaining a copy"
            in text)
    assert 'THE SOFTWARE IS PROVIDED "AS IS", WITHOUT WARRANTY OF ANY KIND' in text
    assert (REPO / "bucksim" / "py.typed").is_file()  # PEP 561 marker
    project = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    assert "py.typed" in project["tool"]["setuptools"]["package-data"]["bucksim"]
    classifiers = set(project["project"]["classifiers"])
    assert {"License :: OSI Approved :: MIT License", "Typing :: Typed",
            "Operating System :: OS Independent",
            "Programming Language :: Python :: 3.11",
            "Programming Language :: Python :: 3.12",
            "Programming Language :: Python :: 3.13"} <= classifiers
    extras = project["project"]["optional-dependencies"]
    for tool in ("sphinx", "numpydoc", "myst-nb"):
        assert any(req.startswith(tool) for req in extras["docs"]), tool
        # the README's one test command installs the docs tools too
        assert any(req.startswith(tool) for req in extras["test"]), tool
