"""Line numbers of the keys of a TOML document.

``tomllib`` reports a line only for syntax errors, so a value that parses but
is rejected later (a negative inductance, an unknown key) is located with this
small scanner. It reads a document that ``tomllib`` has already accepted and
tracks structure only: ``[table]`` and ``[[array]]`` headers, ``key =`` pairs
(dotted and quoted keys too), arrays and inline tables. Strings are skipped
whole, so text inside them never looks like a key.

Paths are tuples of keys and array indices: ``("load", "steps", 2, "time")``
for ``load.steps[2].time``, whether the steps are written as an inline array
or as ``[[load.steps]]`` tables.
"""

from __future__ import annotations

import bisect
import re
import tomllib
import warnings

from bucksim.errors import StepAfterEndWarning

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_SCALAR = re.compile(r"[^,\]}\r\n#]*")
_PATH_PART = re.compile(r"([^.\[\]]+)|\[(\d+)\]")


def key_lines(text):
    """Map each key path of a TOML document to its 1-based line.

    Parameters
    ----------
    text : str
        A document that ``tomllib.loads`` accepts.

    Returns
    -------
    dict
        ``{path: line}``, with ``path`` a tuple of ``str`` keys and ``int``
        array indices. A table or array also maps to the line where it first
        appears (its header, or the first key that implies it). On text that
        is not valid TOML the paths found before the fault are returned.
    """
    scanner = _Scanner(text)
    try:
        scanner.run()
    except (IndexError, AttributeError, ValueError, tomllib.TOMLDecodeError):
        pass  # best effort: locating an error must never raise one of its own
    return scanner.lines


_SYNTAX_POSITION = re.compile(r"\s*\(at line (\d+), column (\d+)\)$")
_TWICE = ("Cannot overwrite a value", "Cannot declare", "Cannot mutate")


def toml_error(exc, text, source):
    """A :class:`~bucksim.errors.ScenarioError` for a ``tomllib.TOMLDecodeError``.

    It names the file and line; a key given twice (which TOML forbids) is
    named by its dotted path, found on the line ``tomllib`` reports.
    """
    from bucksim.errors import ScenarioError

    message = str(exc)
    m = _SYNTAX_POSITION.search(message)
    if m is None:
        return ScenarioError("TOML syntax", message, file=source)
    detail, line = message[: m.start()], int(m.group(1))
    if detail.startswith(_TWICE):
        key = key_on_line(text, line)
        if key is not None:
            return ScenarioError(key, "is given twice (TOML allows each key and table "
                                 "once)", file=source, line=line)
    return ScenarioError("TOML syntax", f"{detail} (column {m.group(2)})", file=source,
                         line=line)


def key_on_line(text, line):
    """Dotted key of the last key (or table header) on 1-based ``line``, or None."""
    scanner = _LineScanner(text, line)
    try:
        scanner.run()
    except (IndexError, AttributeError, ValueError, tomllib.TOMLDecodeError):
        pass
    if not scanner.found:
        return None
    path = scanner.found[-1]
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else part)
    return out


def warn_steps_after_end(scenario):
    """Warn (:class:`~bucksim.errors.StepAfterEndWarning`) about each load or supply step at or
    after the run's end.

    Such a step is valid but never happens in the run, which is most likely
    not what the file's author meant (a duration in the wrong unit, a step
    time in the wrong place). The message names the file and the key.
    """
    from bucksim.model.units import format_si

    end = scenario.n_cycles * scenario.period
    where = f"{scenario.source}: " if scenario.source else ""
    for section, steps in (("load", scenario.load.steps), ("supply", scenario.supply.steps)):
        for i, step in enumerate(steps):
            if step.time >= end:
                warnings.warn(f"{where}{section}.steps[{i}].time: the step at "
                              f"{format_si(step.time, 's')} is at or after the end of the run "
                              f"({format_si(end, 's')}), so it never happens",
                              StepAfterEndWarning, stacklevel=3)


def parse_key_path(key):
    """Split a dotted key such as ``"load.steps[2].time"`` into a path tuple."""
    return tuple(name if index == "" else int(index)
                 for name, index in _PATH_PART.findall(key))


def line_of(lines, key):
    """Line of ``key`` (dotted) in ``lines`` from :func:`key_lines`.

    Falls back to the nearest enclosing table or array that was found, so a
    missing key is placed at its table's header. ``None`` when nothing of the
    path is in the document.
    """
    path = parse_key_path(key)
    for n in range(len(path), 0, -1):
        if path[:n] in lines:
            return lines[path[:n]]
    return None


def _match(pattern, s, i):
    """``pattern.match(s, i)``, or ValueError where the text is not TOML."""
    m = pattern.match(s, i)
    if m is None:
        raise ValueError(f"unexpected text at offset {i}")
    return m


class _Scanner:
    def __init__(self, text):
        self.s = text
        self.i = 0
        self.line_starts = [0] + [m.end() for m in re.finditer("\n", text)]
        self.lines = {}
        self.array_index = {}  # [[header]] key tuple -> index of its current table

    def line(self):
        return bisect.bisect_right(self.line_starts, self.i)

    def record(self, path, line):
        for n in range(1, len(path) + 1):
            self.lines.setdefault(path[:n], line)

    def skip_spaces(self):
        while self.i < len(self.s) and self.s[self.i] in " \t":
            self.i += 1

    def skip_blank(self):
        """Skip spaces, newlines and comments."""
        s = self.s
        while self.i < len(s):
            c = s[self.i]
            if c in " \t\r\n":
                self.i += 1
            elif c == "#":
                end = s.find("\n", self.i)
                self.i = len(s) if end < 0 else end
            else:
                break

    def run(self):
        s = self.s
        table = ()
        while True:
            self.skip_blank()
            if self.i >= len(s):
                return
            start, line = self.i, self.line()
            if s.startswith("[[", self.i):
                self.i += 2
                table = self.resolve(self.keys(), array=True)
                self.skip_spaces()
                self.i += 2  # "]]"
                self.record(table, line)
            elif s[self.i] == "[":
                self.i += 1
                table = self.resolve(self.keys(), array=False)
                self.skip_spaces()
                self.i += 1  # "]"
                self.record(table, line)
            else:
                path = table + self.keys()
                self.skip_spaces()
                self.i += 1  # "="
                self.skip_spaces()
                self.record(path, line)
                self.value(path)
            if self.i <= start:  # no progress: not a document tomllib accepted
                return

    def resolve(self, keys, array):
        """Header keys -> path, with the current index of each array of tables."""
        path = []
        for n, key in enumerate(keys):
            path.append(key)
            prefix = keys[: n + 1]
            if array and n == len(keys) - 1:
                index = self.array_index.get(prefix, -1) + 1
                self.array_index[prefix] = index
                for nested in [k for k in self.array_index if len(k) > len(prefix)
                               and k[: len(prefix)] == prefix]:
                    del self.array_index[nested]  # a new element starts its arrays afresh
                path.append(index)
            elif prefix in self.array_index:
                path.append(self.array_index[prefix])
        return tuple(path)

    def keys(self):
        """Read a (possibly dotted, possibly quoted) key."""
        s = self.s
        keys = []
        while True:
            self.skip_spaces()
            if s[self.i] in "\"'":
                start = self.i
                self.string()
                keys.append(tomllib.loads("k = " + s[start:self.i])["k"])
            else:
                m = _match(_BARE_KEY, s, self.i)
                keys.append(m.group())
                self.i = m.end()
            self.skip_spaces()
            if self.i < len(s) and s[self.i] == ".":
                self.i += 1
                continue
            return tuple(keys)

    def value(self, path):
        s = self.s
        c = s[self.i]
        if c in "\"'":
            self.string()
        elif c == "[":
            self.i += 1
            index = 0
            while True:
                self.skip_blank()
                if s[self.i] == "]":
                    self.i += 1
                    return
                self.record(path + (index,), self.line())
                self.value(path + (index,))
                self.skip_blank()
                if s[self.i] == ",":
                    self.i += 1
                index += 1
        elif c == "{":
            self.i += 1
            while True:
                self.skip_blank()
                if s[self.i] == "}":
                    self.i += 1
                    return
                line = self.line()
                inner = path + self.keys()
                self.skip_spaces()
                self.i += 1  # "="
                self.skip_spaces()
                self.record(inner, line)
                self.value(inner)
                self.skip_blank()
                if s[self.i] == ",":
                    self.i += 1
        else:
            self.i = _match(_SCALAR, s, self.i).end()

    def string(self):
        """Skip a basic, literal or multi-line string starting at ``self.i``."""
        s = self.s
        quote = s[self.i]
        if s.startswith(quote * 3, self.i):
            j = self.i + 3
            while True:
                if j >= len(s):
                    raise IndexError("unterminated multi-line string")
                if quote == '"' and s[j] == "\\":
                    j += 2
                elif s.startswith(quote * 3, j):
                    j += 3
                    for _ in range(2):  # up to two quotes may end the content
                        if j < len(s) and s[j] == quote:
                            j += 1
                    self.i = j
                    return
                else:
                    j += 1
        j = self.i + 1
        while s[j] != quote:
            j += 2 if (quote == '"' and s[j] == "\\") else 1
        self.i = j + 1


class _LineScanner(_Scanner):
    """A scanner that keeps the keys found on one 1-based line, in order."""

    def __init__(self, text, line):
        super().__init__(text)
        self.wanted, self.found = line, []

    def record(self, path, line):
        if line == self.wanted:
            self.found.append(path)
