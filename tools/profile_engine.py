"""Where the compiled engine spends its time: perf samples bucketed by kernel.

numba's compiled code carries no symbols a sampling profiler can read, and most of the
cycle loop's helpers are inlined into ``run_periods``. The kernels that are not inlined
(``advance``, ``taylor_step``, ``locate_zero``, ``reach3``, ``newton_crossing``, ...) are
separate functions, though, and their names are in the object code numba caches. This
tool runs a bench rail, reads those names from the cache (``NUMBA_CACHE_DIR``), asks the
JIT for each one's address in this process, and writes them to a JSON file; a second call
buckets ``perf``'s samples by the nearest kernel below each address::

    export NUMBA_CACHE_DIR=/tmp/nbcache       # a cache of its own (filled on first run)
    python tools/profile_engine.py node --addresses /tmp/addr.json    # compile once
    perf record -F 2999 -o /tmp/p.data python tools/profile_engine.py node \\
        --addresses /tmp/addr.json
    python tools/profile_engine.py --report /tmp/p.data --addresses /tmp/addr.json

Cases: ``plain`` (forced PWM, two states), ``node`` (node capacitance), ``ramps``
(node and the channels' current ramps), ``dcm-node`` (diode emulation, the node
ringing), ``analog`` (the analog voltage-mode loop in DCM). "(other)" is everything
outside the kernels: Python, imports, buffers.
Relies on numba internals (the cache's pickle layout, the code library's JIT engine);
a tool for contributors, not part of bucksim.
"""

from __future__ import annotations

import argparse
import bisect
import collections
import glob
import json
import os
import pickle
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _rail(case: str):
    sys.path.insert(0, os.path.join(ROOT, "benchmarks"))
    from bench_engine import rail

    node = (400e-12, 1.2e-9)
    if case == "plain":
        return rail("forced-pwm", 0.66, 2_000_000)
    if case == "node":
        return rail("forced-pwm", 0.66, 400_000, coss=node)
    if case == "ramps":
        return rail("forced-pwm", 0.66, 100_000, coss=node, edges=(5e-9, 5e-9))
    if case == "dcm-node":
        return rail("diode-emulation", 30.0, 100_000, coss=node)
    raise SystemExit(f"unknown case {case!r}: plain, node, ramps, dcm-node or analog")


def _cached_names(cache_dir: str) -> set[str]:
    """Function symbols in the ELF objects of numba's cache files."""
    names: set[str] = set()

    def walk(o, depth=0):
        if isinstance(o, bytes) and o[:4] == b"\x7fELF":
            path = os.path.join(cache_dir, ".profile_engine.o")
            with open(path, "wb") as fh:
                fh.write(o)
            out = subprocess.run(["nm", "--defined-only", path], capture_output=True,
                                 text=True, check=False).stdout
            os.remove(path)
            for line in out.splitlines():
                parts = line.split()
                if len(parts) == 3 and parts[1] in "tT":
                    names.add(parts[2])
        elif depth < 6 and isinstance(o, (tuple, list)):
            for x in o:
                walk(x, depth + 1)

    for f in glob.glob(os.path.join(cache_dir, "**", "*.nbc"), recursive=True):
        with open(f, "rb") as fh:
            walk(pickle.loads(fh.read()))
    return names


def _demangle(name: str) -> str:
    """``bucksim.engine.bounds.reach3`` from numba's length-prefixed mangling."""
    s = name[name.find("_ZN") + 3:]
    parts, j = [], 0
    while j < len(s) and s[j].isdigit():
        k = j
        while s[k].isdigit():
            k += 1
        n = int(s[j:k])
        parts.append(s[k:k + n])
        j = k + n
    return ("cfunc." if name.startswith("cfunc") else "") + ".".join(parts)


def run_and_map(case: str, out: str) -> None:
    sys.path.insert(0, os.path.join(ROOT, "benchmarks"))
    from bench_engine import engine_rate

    import bucksim.engine.driver as driver

    if case == "analog":
        from bench_engine import closed_loop_rate
        rate = closed_loop_rate(200_000, implementation="analog")
    else:
        rate, _ = engine_rate(_rail(case))
    print(f"{case}: {rate:.3g} cycles/s")
    cache = os.environ.get("NUMBA_CACHE_DIR")
    if not cache:
        raise SystemExit("set NUMBA_CACHE_DIR to a cache of its own (see the docstring)")
    engine = next(iter(driver.run_cycles.overloads.values())).library._codegen._engine
    addresses = {}
    for name in _cached_names(cache):
        try:
            addr = engine.get_function_address(name)
        except Exception:       # a symbol this process did not load
            addr = 0
        if addr:
            addresses[_demangle(name)] = addr
    with open(out, "w", encoding="utf-8") as fh:
        json.dump(addresses, fh)
    print(f"{len(addresses)} kernel addresses in {out}")


def report(perf_data: str, addresses: str, top: int = 20) -> None:
    with open(addresses, encoding="utf-8") as fh:
        items = sorted((v, k) for k, v in json.load(fh).items())
    starts = [v for v, _ in items]
    ips = subprocess.run(["perf", "script", "-i", perf_data, "-F", "ip"], capture_output=True,
                         text=True, check=True).stdout.split()
    count: collections.Counter[str] = collections.Counter()
    for ip in (int(x, 16) for x in ips):
        i = bisect.bisect_right(starts, ip) - 1
        count[items[i][1] if i >= 0 and ip - starts[i] < 400_000 else "(other)"] += 1
    for name, c in count.most_common(top):
        print(f"{100 * c / len(ips):5.1f} %  {name}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("case", nargs="?", default="node")
    ap.add_argument("--addresses", required=True, help="JSON file of kernel addresses")
    ap.add_argument("--report", metavar="PERF_DATA", help="bucket this perf recording")
    a = ap.parse_args(argv)
    if a.report:
        report(a.report, a.addresses)
    else:
        run_and_map(a.case, a.addresses)


if __name__ == "__main__":
    main()
