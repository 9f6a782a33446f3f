"""Every benchmark script loads as the runner loads it and has the entry point it calls.

Figures are never asserted here (benchmarks print them); this only keeps a script from being
broken by a change elsewhere (a helper moved out of a sibling script, a renamed function)
without anyone noticing until the next long run.
"""

import os
import subprocess
import sys

import pytest

from benchmarks import run

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.mark.parametrize("name,path", run.discover(), ids=[n for n, _ in run.discover()])
def test_every_benchmark_loads_with_a_main(name, path):
    module = run.load(name, path)
    assert callable(module.main)


def test_the_runner_lists_every_script_in_the_folder():
    out = subprocess.run([sys.executable, "-m", "benchmarks", "--list"], cwd=ROOT, capture_output=True,
                         text=True, timeout=120, env=dict(os.environ, PYTHONPATH=ROOT))
    assert out.returncode == 0, out.stderr
    listed = out.stdout.split()
    expected = sorted(f[len("bench_"):-3] for f in os.listdir(os.path.join(ROOT, "benchmarks"))
                      if f.startswith("bench_") and f.endswith(".py"))
    assert [n for n in listed if n in expected] == expected
