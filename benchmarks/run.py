"""Run every benchmark in this folder, print each figure beside its reference, write one JSON file.

    python -m benchmarks                      # every benchmarks/bench_*.py
    python benchmarks/run.py --only converter pipeline
    python benchmarks/run.py --json /tmp/figures.json

A benchmark is a script ``benchmarks/bench_<name>.py`` with ``main(argv=None)`` that returns a
dict (and can also be run on its own). The runner calls ``main([])``, so a script's defaults are
its full run. Figures are printed from the dict this way:

* ``"figures"``: a list of rows ``{"name", "value", "unit", "reference", "reference_value"}``
  (the last two optional; ``"ratio"`` and ``"target"`` are printed when present) - one line each,
  the reference beside the figure;
* anything else: printed as ``key.path: value`` lines.

The whole result (plus the machine it ran on) goes to one JSON file. Nothing here asserts a time.
"""

import argparse
import importlib.util
import json
import os
import platform
import sys
import time
import traceback

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
DEFAULT_JSON = os.path.join(HERE, "last_run.json")


def discover(only=None):
    """The benchmark scripts, as (name, path), sorted; ``only`` filters by substrings."""
    names = sorted(f for f in os.listdir(HERE) if f.startswith("bench_") and f.endswith(".py"))
    found = [(f[len("bench_"):-3], os.path.join(HERE, f)) for f in names]
    if only:
        found = [(n, p) for n, p in found if any(o in n for o in only)]
    return found


def load(name, path):
    if ROOT not in sys.path:
        sys.path.insert(0, ROOT)
    spec = importlib.util.spec_from_file_location(f"_bench_{name}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def machine():
    """Where the figures came from: CPU, cores, load, library versions."""
    import numpy
    import scipy
    cpu = platform.processor()
    try:
        with open("/proc/cpuinfo") as f:
            cpu = next((ln.split(":", 1)[1].strip() for ln in f if ln.startswith("model name")),
                       cpu)
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else None
    return dict(cpu=cpu, cores=os.cpu_count(), platform=platform.platform(),
                python=platform.python_version(), numpy=numpy.__version__,
                scipy=scipy.__version__, load_average=list(load) if load else None)


def _fmt(v):
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def print_result(name, result, out=sys.stdout):
    """Print a benchmark's dict: figure rows with their references, or flattened keys."""
    print(f"\n== {name}: {result.get('title', '')}".rstrip(": "), file=out)
    rows = result.get("figures")
    if isinstance(rows, list):
        width = max([len(str(r.get("name", ""))) for r in rows] + [10])
        for r in rows:
            unit = r.get("unit", "")
            line = f"  {str(r.get('name', '')):<{width}}  {_fmt(r.get('value')):>10} {unit:<6}"
            if "reference" in r:
                ref = r.get("reference_value")
                line += f"  | {r['reference']}: {_fmt(ref)} {unit}" if ref is not None \
                    else f"  | {r['reference']}"
            if "ratio" in r:
                line += f"  ratio {_fmt(r['ratio'])}"
            if "target" in r:
                line += f"  (target {r['target']})"
            print(line, file=out)
        return
    for key, value in _flatten(result):
        print(f"  {key}: {_fmt(value)}", file=out)


def _flatten(d, prefix=""):
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            yield from _flatten(v, key + ".")
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            for i, x in enumerate(v):
                yield from _flatten(x, f"{key}[{i}].")
        else:
            yield key, v


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="*", help="run only benchmarks whose name contains one of these")
    ap.add_argument("--json", default=DEFAULT_JSON, help=f"output file, default {DEFAULT_JSON}")
    ap.add_argument("--list", action="store_true", help="list the benchmarks and stop")
    args = ap.parse_args(argv)
    found = discover(args.only)
    if args.list:
        for name, path in found:
            print(f"{name:20s} {os.path.relpath(path, ROOT)}")
        return 0
    report = dict(machine=machine(), started=time.strftime("%Y-%m-%d %H:%M:%S"), benchmarks={})
    failed = 0
    for name, path in found:
        t0 = time.perf_counter()
        try:
            module = load(name, path)
            if not callable(getattr(module, "main", None)):
                print(f"\n== {name}: skipped (no main())")
                continue
            result = module.main([])
            if not isinstance(result, dict):
                print(f"\n== {name}: skipped (main() returned {type(result).__name__}, not a dict)")
                continue
        except Exception:   # one broken script must not hide the others' figures
            failed += 1
            print(f"\n== {name}: FAILED\n{traceback.format_exc()}")
            report["benchmarks"][name] = {"error": traceback.format_exc(limit=3)}
            continue
        result.setdefault("wall_s", time.perf_counter() - t0)
        report["benchmarks"][name] = result
        print_result(name, result)
    report["machine"]["load_average_after"] = list(os.getloadavg()) \
        if hasattr(os, "getloadavg") else None
    with open(args.json, "w") as f:
        json.dump(report, f, indent=2, default=str)
        f.write("\n")
    print(f"\nfigures written to {args.json}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
