"""Batch conversion: many files through the one job model, on Dask (local or a cluster).

Modules
-------
inputs     files, folders and manifests -> :class:`inputs.Item`; output names; clashes refused
plan       items -> prepared jobs (one verified design per route, shared); template or re-run
ledger     the SQLite ledger in the output folder (what is done, with which source and options)
cluster    the Dask client: an embedded LocalCluster or ``--scheduler``; worker path probe
tasks      the task a worker runs for one file (imported on the workers)
run        the batch: skip what is done, submit, follow ``as_completed``, retry lost work
progress   the progress line on stderr and the JSON-lines events
report     the CSV and JSON report and the batch sheet (HTML, offline)
web        batches in the web app's store (a batch is a group of conversions); zip streaming
"""

from .inputs import Item, collect, NAME_PARTS
from .run import BatchOptions, BatchOutcome, run_batch, EXIT_ALL_DONE, EXIT_BAD_INPUT, \
    EXIT_SOME_FAILED

__all__ = ["Item", "collect", "NAME_PARTS", "BatchOptions", "BatchOutcome", "run_batch",
           "EXIT_ALL_DONE", "EXIT_BAD_INPUT", "EXIT_SOME_FAILED"]
