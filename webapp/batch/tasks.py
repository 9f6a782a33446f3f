"""What a Dask worker runs: one task per file, pure and idempotent.

The task gets a prepared :class:`webapp.jobs.Job` without its plan and the route's plan (a
future the scheduler resolves from the copy scattered to every worker), and runs it with
:func:`webapp.jobs.run` (or :func:`webapp.jobs.rerun` for an exact recipe re-run). The output
is written atomically, so a worker killed mid-file leaves no file under the final name and the
scheduler can run the task again elsewhere. Only the client writes the ledger.

This module is imported on the workers: it needs numpy, scipy and soundfile, not Flask.
"""

from dataclasses import replace
import os
import socket
import time

from .. import jobs
from ..dsp.errors import RateferryError
from ..jsontools import jsonable

__all__ = ["convert_one", "probe_paths", "worker_name"]


def worker_name():
    """The address of the Dask worker running this code, else the host name."""
    try:
        from distributed import get_worker
        return get_worker().address
    except (ImportError, ValueError):
        return socket.gethostname()


def convert_one(job, plan, recipe=None):
    """Convert one file; returns a plain dict (``ok``, ``figures`` or ``message``, timings).

    A file the converter refuses returns ``ok: False`` with the one-line message ``convert``
    prints; anything else (a bug, a lost worker) reaches the client as a task error.
    """
    t0 = time.perf_counter()
    job = replace(job, plan=plan)
    out = dict(ok=True, worker=worker_name(), pid=os.getpid())
    # jobs.run holds BLAS to one thread (threadpoolctl) while it runs; the worker's
    # environment (cluster.BLAS_ENV) does the same for anything else
    try:
        if recipe is not None:
            check = jobs.rerun(recipe, job.source, job.target, job=job)
            result = check.result
            out["recipe"] = check.figures()
        else:
            result = jobs.run(job)
    except RateferryError as exc:
        out.update(ok=False, message=exc.message, task_s=time.perf_counter() - t0)
        return out
    out.update(figures=jsonable(result.figures()), task_s=time.perf_counter() - t0)
    return out


def probe_paths(sources, out_dir):
    """On a worker: the first path it cannot use, as a message, or None.

    Every source must be readable and the output folder writable (a file is created and
    removed), at the same paths the client sees.
    """
    for path in sources:
        if not os.path.isfile(path):
            return f"cannot see '{path}' (no such file on that machine)"
        if not os.access(path, os.R_OK):
            return f"cannot read '{path}' (permission denied)"
    if not os.path.isdir(out_dir):
        return f"cannot see the output folder '{out_dir}'"
    test = os.path.join(out_dir, f".rateferry-probe-{socket.gethostname()}-{os.getpid()}")
    try:
        with open(test, "wb") as f:
            f.write(b"rateferry")
        os.unlink(test)
    except OSError as exc:
        return f"cannot write in the output folder '{out_dir}' ({exc.strerror})"
    return None
