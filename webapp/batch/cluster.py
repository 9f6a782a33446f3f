"""The Dask client a batch runs on: an embedded local cluster, or a cluster the user runs.

* Default: a :class:`distributed.LocalCluster` sized to the machine: one worker process per
  available core, one thread each (a conversion already overlaps reading, converting, metering
  and writing on its own threads), BLAS held to one thread per worker by environment variables
  set before the worker processes start (and by threadpoolctl inside each task).
* ``--scheduler ADDRESS`` or the environment variable :data:`SCHEDULER_ENV` connect to an
  existing scheduler instead; its workers must see the inputs and the output folder at the same
  paths, which :func:`check_paths` probes on every worker before any work.
"""

from contextlib import contextmanager
import logging
import os

from ..dsp.errors import ParameterError
from .tasks import probe_paths

__all__ = ["SCHEDULER_ENV", "BLAS_ENV", "connect", "check_paths", "default_workers"]

SCHEDULER_ENV = "RATEFERRY_SCHEDULER"
#: One BLAS / OpenMP thread per worker process.
BLAS_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
            "BLIS_NUM_THREADS": "1", "VECLIB_MAXIMUM_THREADS": "1", "NUMEXPR_NUM_THREADS": "1"}
_CONNECT_TIMEOUT_S = 20


def default_workers():
    """Cores this process may use (the affinity mask where the platform has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:
        return max(1, os.cpu_count() or 1)


def scheduler_address(option):
    """The ``--scheduler`` value, else :data:`SCHEDULER_ENV`, else None (embedded cluster)."""
    address = option or os.environ.get(SCHEDULER_ENV) or None
    return address.strip() if address else None


@contextmanager
def connect(*, scheduler=None, workers=None):
    """Yield ``(client, description)``; the embedded cluster is closed on exit.

    Raises
    ------
    ParameterError
        When the scheduler can't be reached (naming the address), or ``workers`` is bad.
    """
    from distributed import Client, LocalCluster
    if scheduler:
        try:
            client = Client(scheduler, timeout=_CONNECT_TIMEOUT_S, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise ParameterError(f"cannot reach the Dask scheduler at {scheduler}: {exc}",
                                 "scheduler") from None
        try:
            client.wait_for_workers(1, timeout=_CONNECT_TIMEOUT_S)
        except (OSError, TimeoutError):
            client.close()
            raise ParameterError(f"the Dask scheduler at {scheduler} has no workers (waited "
                                 f"{_CONNECT_TIMEOUT_S} s)", "scheduler") from None
        try:
            yield client, f"Dask scheduler {scheduler}"
        finally:
            client.close()
        return
    n = default_workers() if workers is None else workers
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 1024:
        raise ParameterError(f"workers must be a whole number from 1 to 1024, got {n!r}",
                             "workers")
    saved = {k: os.environ.get(k) for k in BLAS_ENV}
    os.environ.update(BLAS_ENV)     # inherited by the worker processes
    try:
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=logging.ERROR,
                               host="127.0.0.1")
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    try:
        client = Client(cluster, set_as_default=False)
        try:
            yield client, f"local cluster, {n} worker process{'es' if n != 1 else ''}"
        finally:
            client.close()
    finally:
        cluster.close()


def check_paths(client, sources, out_dir):
    """Probe every worker: each must read every source and write in ``out_dir``.

    Raises
    ------
    ParameterError
        Naming the first worker that can't and the path.
    """
    answers = client.run(probe_paths, list(sources), out_dir)
    for worker, problem in sorted(answers.items()):
        if problem:
            raise ParameterError(f"Dask worker {worker} {problem}; the files and the output "
                                 "folder must be reachable from every worker at the same "
                                 "paths", "scheduler")
    return sorted(answers)
