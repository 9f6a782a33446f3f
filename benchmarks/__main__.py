"""``python -m benchmarks``: the same as ``python benchmarks/run.py``."""

import os
import runpy

runpy.run_path(os.path.join(os.path.dirname(os.path.abspath(__file__)), "run.py"),
               run_name="__main__")
