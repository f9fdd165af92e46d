"""The README and the docs pages as a fresh-clone walk-through: every command they show runs
and says something sane.

The commands are read from the README and the Markdown pages of ``docs/`` (the README first,
then the getting-started page with the tour, then the others) in this working tree (they may
hold edits not committed yet) and run in a fresh ``git clone`` of the committed HEAD, so they
see only what a user who clones the project sees: committed code and committed scenarios.
Output files land in the clone (a temporary folder), so nothing in the working tree is
touched. A command or snippet shown on two pages (the README's first look repeats the
getting-started page's) runs once.

* Shell commands: every line of every ``bash`` block. The set-up blocks' two lines (in the
  README and on the getting-started page) install the package and run this very suite; they
  are checked, not run: each block must hold exactly the two documented commands, and
  ``.ci/run`` must run the second one. What follows a
  ``pip install ... &&`` on those lines is run when it is a ``bucksim`` command (the default
  demo rail). ``bucksim`` is the installed command when it is on ``PATH``, else
  ``python -m bucksim`` run in the clone.
* Python snippets: every ``python`` block runs as a script in the clone, against the installed
  package if there is one, else against the clone's.

Each command must exit 0 and print something plausible for its verb (a summary table with
"efficiency", JSON with the summary keys, a CSV with its rows, a PNG or HDF5 file where it
writes one).
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
README = REPO / "README.md"
DOCS = REPO / "docs"
GETTING_STARTED = DOCS / "getting-started.md"
SCENARIO_REFERENCE = DOCS / "scenario-reference.md"
PERFORMANCE = DOCS / "performance.md"
#: Every page whose commands the walk-through runs, in order: the README, the tour (its
#: commands write the files that later ones read), then the other pages.
PAGES = (README, GETTING_STARTED) + tuple(
    sorted(p for p in DOCS.glob("*.md") if p != GETTING_STARTED))

SETUP_COMMANDS = ['python -m pip install -e . && bucksim run',
                  'python -m pip install -e ".[test]" && python -m pytest']

#: The README's sections, in order: the front door; the reference lives in docs/.
SECTIONS = ("Set-up", "A first look", "Documentation", "Safety", "License")

#: Each docs page: its title, then sections it must hold, in this order (the content the
#: README held before it moved there).
DOC_SECTIONS = {
    "getting-started.md": ("Getting started",
                           ("Set-up", "A first look", "What is modelled", "A 5-minute tour")),
    "scenario-reference.md": ("Scenario reference",
                              ("Top level", "`[supply]`", "`[run]`",
                               "Quantities with SI prefixes", "Error messages",
                               "Load profile (for compare)")),
    "summary-reference.md": ("Summary reference", ()),
    "hdf5-layout.md": ("Stored runs (HDF5 layout)", ()),
    "python-api.md": ("Python API", ()),
    "performance.md": ("Performance", ()),
    "validation.md": ("Validation", ("Known limits",)),
    "safety.md": ("Safety and license", ("Safety", "License")),
}

SUMMARY_KEYS = ("window", "conduction_mode", "reverse_current", "output_voltage",
                "inductor_current", "devices", "power", "efficiency", "energy_balance_error",
                "transients")

#: Options whose value is a file the command writes.
OUTPUT_OPTIONS = ("--out", "--figure", "--csv", "--breakdown")

TIMEOUT = 900  # s, per command: a cold numba cache compiles every kernel in the first ones


# ----------------------------------------------------------------------------- reading

def code_blocks(text):
    """``[(section, language, [lines])]`` for every fenced block, in order."""
    out, section, block = [], "", None
    for line in text.splitlines():
        if block is None:
            if line.startswith("## "):
                section = line[3:].strip()
            m = re.match(r"^```(\S*)", line)  # also MyST directives: ```{toctree}
            if m:
                block = (section, m.group(1), [])
        elif line.startswith("```"):
            out.append(block)
            block = None
        else:
            block[2].append(line)
    assert block is None, "a code block is not closed"
    return out


def shell_commands(lines):
    """Commands of a bash block: continuation lines joined, blank lines and comments dropped."""
    out, pending = [], ""
    for line in lines:
        pending += line.strip() if pending else line.rstrip()
        if pending.endswith("\\"):
            pending = pending[:-1].rstrip() + " "
            continue
        command, pending = pending.strip(), ""
        if command and not command.startswith("#"):
            out.append(command)
    assert not pending, "README: a bash block ends in a continuation line"
    return out


def readme_blocks(pages=PAGES):
    """``[(section, language, [lines])]`` of every page, in page order."""
    return [block for page in pages for block in code_blocks(page.read_text(encoding="utf-8"))]


def bash_commands(pages=PAGES):
    """``[(section, command)]`` of every bash block."""
    return [(section, c) for section, lang, lines in readme_blocks(pages) if lang == "bash"
            for c in shell_commands(lines)]


def runnable_commands():
    """The commands the walk-through runs: everything but installing and the test suite,
    each once (in the order first shown)."""
    out = []
    for _section, command in bash_commands():
        if "pip install" not in command:
            out.append(command)
            continue
        for part in (p.strip() for p in command.split("&&")):
            if part.startswith("bucksim"):
                out.append(part)
    return list(dict.fromkeys(out))


def headings(page, level=2):
    marker = "#" * level + " "
    return [line[len(marker):].strip() for line in page.read_text(encoding="utf-8").splitlines()
            if line.startswith(marker)]


# ----------------------------------------------------------------------------- fast checks

def test_setup_block_is_the_two_documented_commands():
    for page in (README, GETTING_STARTED):
        setup = [c for section, c in bash_commands((page,)) if section == "Set-up"]
        assert setup == SETUP_COMMANDS, page.name
    ci = (REPO / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert SETUP_COMMANDS[1] in [line.strip() for line in ci]
    # installing happens in the set-up section only
    assert all("pip install" not in c for section, c in bash_commands() if section != "Set-up")


def test_sections_in_order_and_every_command_is_bucksim():
    heads = headings(README)
    assert [h for h in heads if h in SECTIONS] == list(SECTIONS)  # in this order
    assert heads[-2:] == ["Safety", "License"]
    for name, (title, sections) in DOC_SECTIONS.items():
        page = DOCS / name
        assert headings(page, 1) == [title], name
        heads = headings(page)
        assert [h for h in heads if h in sections] == list(sections), name
    text = PERFORMANCE.read_text(encoding="utf-8")
    assert "<!-- bench-engine:start -->" in text and "<!-- bench-engine:end -->" in text
    commands = runnable_commands()
    assert len(commands) >= 12
    for command in commands:
        assert shlex.split(command, comments=True)[0] == "bucksim", command
    argvs = [shlex.split(c, comments=True) for c in commands]
    verbs = {argv[1] for argv in argvs if len(argv) > 1}
    assert {"run", "report", "crosscheck", "boundary", "compare", "sweep", "plot"} <= verbs


def test_every_scenario_key_is_documented():
    from bucksim.model import scenario
    from bucksim.model.compensator import COMPENSATOR_KEYS

    reference = SCENARIO_REFERENCE.read_text(encoding="utf-8")
    keys = set(scenario.TOP_KEYS[:2])
    for names in (scenario.SUPPLY_KEYS, scenario.SWITCHING_KEYS, scenario.INDUCTOR_KEYS,
                  scenario.CAPACITOR_KEYS, scenario.MOSFET_KEYS, scenario.DIODE_KEYS,
                  scenario.LOAD_KEYS, scenario.CONTROL_KEYS, scenario.RUN_KEYS,
                  COMPENSATOR_KEYS):
        keys.update(names)
    keys.update(f"core.{k}" for k in scenario.CORE_KEYS)
    keys.update(f"body_diode.{k}" for k in scenario.DIODE_KEYS)
    for section in scenario.TOP_KEYS[2:]:
        assert f"`[{section}]`" in reference, section
    missing = sorted(k for k in keys if f"`{k}`" not in reference)
    assert not missing, f"scenario keys missing from {SCENARIO_REFERENCE.name}: {missing}"


# ----------------------------------------------------------------------------- walk-through

def _environment():
    env = dict(os.environ)
    env.setdefault("MPLBACKEND", "Agg")
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    env.pop("PYTHONPATH", None)  # the clone, or the installed package, nothing else
    return env


def _output_files(argv, clone):
    out = []
    for i, arg in enumerate(argv[:-1]):
        if arg in OUTPUT_OPTIONS:
            out.append(clone / argv[i + 1])
    return out


def _check_summary(data, command):
    for key in SUMMARY_KEYS:
        assert key in data, f"{command}: summary without {key!r}"
    assert data["conduction_mode"] in ("ccm", "dcm")
    assert 0.0 < data["efficiency"] < 1.0
    assert data["energy_balance_error"] < 1e-9
    for name in ("high_side", "low_side", "inductor", "output_capacitor"):
        assert {"rms", "mean", "conduction_loss", "switching_loss"} <= set(data["devices"][name])


def _check_json(verb, data, command):
    if verb in ("run", "report"):
        _check_summary(data, command)
    elif verb == "crosscheck":
        items = {row["item"] for row in data["rows"]}
        assert "total loss" in items and "high_side.conduction" in items
    elif verb == "boundary":
        assert data["points"] and data["boundary"]["kind"] in ("reversal", "dcm")
    elif verb == "compare":
        assert set(data["rows"]) == set(data["strategies"])
    else:
        raise AssertionError(f"{command}: no check for JSON from {verb!r}")


def _check_csv(path, verb, command):
    rows = list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))
    assert rows, f"{command}: {path.name} holds no rows"
    assert "efficiency" in rows[0], f"{command}: {path.name} has no efficiency column"
    for row in rows:
        assert 0.0 < float(row["efficiency"]) < 1.0, (command, row)
        if verb == "sweep":
            assert row["error"] == "", (command, row["error"])


def _check_file(path, verb, command):
    assert path.is_file() and path.stat().st_size > 0, f"{command}: {path.name} not written"
    if path.suffix == ".png":
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", f"{command}: {path.name}"
    elif path.suffix == ".h5":
        import h5py
        assert h5py.is_hdf5(path), f"{command}: {path.name} is not HDF5"
    elif path.suffix == ".csv":
        _check_csv(path, verb, command)


def check_output(command, stdout, clone):
    """Plausibility of what one command of the README or the docs printed and wrote."""
    argv = shlex.split(command, comments=True)
    verb = argv[1] if len(argv) > 1 else None
    if verb is None or "--help" in argv:
        assert "usage:" in stdout and "run" in stdout, command
        return
    if "--json" in argv:
        _check_json(verb, json.loads(stdout), command)
    elif verb in ("run", "report"):
        assert "efficiency" in stdout and "energy balance error" in stdout, command
    elif verb == "crosscheck":
        assert "closed form" in stdout and "total loss" in stdout, command
    elif verb == "boundary":
        assert "boundary" in stdout and stdout.rstrip().splitlines()[-1].startswith("Caution")
    elif verb == "compare":
        assert "efficiency" in stdout and stdout.rstrip().splitlines()[-1].startswith("Caution")
    elif verb == "sweep" and "--out" not in argv:
        assert "efficiency" in stdout.splitlines()[0], command
    for path in _output_files(argv, clone):
        _check_file(path, verb, command)


def _run(args, clone, env, what):
    proc = subprocess.run(args, cwd=clone, env=env, capture_output=True, text=True,
                          timeout=TIMEOUT, stdin=subprocess.DEVNULL, check=False)
    assert proc.returncode == 0, (f"documented command failed (exit {proc.returncode}): {what}\n"
                                  f"--- stdout\n{proc.stdout[-3000:]}\n"
                                  f"--- stderr\n{proc.stderr[-3000:]}")
    return proc.stdout


@pytest.fixture(scope="module")
def clone(tmp_path_factory):
    if shutil.which("git") is None or not (REPO / ".git").exists():
        pytest.skip("needs git and a git work tree to clone")
    where = tmp_path_factory.mktemp("readme") / "bucksim"
    subprocess.run(["git", "clone", "--quiet", str(REPO), str(where)], check=True,
                   timeout=300)
    return where


@pytest.mark.slow
def test_readme_walk_through(clone):
    env = _environment()
    if shutil.which("bucksim"):
        prelude = ""
    else:  # not installed: the clone's own package, as `python -m bucksim` in its folder
        prelude = f'bucksim() {{ {shlex.quote(sys.executable)} -m bucksim "$@"; }}\n'
    commands = runnable_commands()
    for command in commands:
        stdout = _run(["bash", "-c", "set -eo pipefail\n" + prelude + command], clone, env,
                      command)
        check_output(command, stdout, clone)

    # the Python snippets, against the same package the commands used
    installed = subprocess.run([sys.executable, "-P", "-c", "import bucksim"], cwd=clone,
                               env=env, capture_output=True, check=False).returncode == 0
    py_env = dict(env, PYTHONSAFEPATH="1") if installed else dict(env, PYTHONPATH=str(clone))
    snippets = list(dict.fromkeys(tuple(lines) for _, lang, lines in readme_blocks()
                                  if lang == "python"))
    assert snippets
    for k, lines in enumerate(snippets):
        script = clone / f"readme_snippet_{k}.py"
        script.write_text("\n".join(lines) + "\n", encoding="utf-8")
        _run([sys.executable, str(script)], clone, py_env,
             f"python block {k}:\n{script.read_text(encoding='utf-8')}")
