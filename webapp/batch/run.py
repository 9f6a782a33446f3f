"""Run a batch: prepare every file, skip what the ledger says is done, convert the rest on Dask.

Exit codes (:func:`run_batch` returns them in :class:`BatchOutcome`):

* 0 (:data:`EXIT_ALL_DONE`): every file is done (converted now or already done before);
* 2 (:data:`EXIT_BAD_INPUT`): bad input found before any work: an option, a manifest line, two
  inputs writing the same output name, an unreachable scheduler, a worker that can't see a path;
  nothing was converted;
* 4 (:data:`EXIT_SOME_FAILED`): the batch ran, but some files failed (listed in the report and
  on stderr with the same one-line message ``rateferry convert`` prints); the others are done;
* 130: interrupted (Ctrl-C); what finished is in the ledger, the rest is redone next time.

Restart safety: outputs are written atomically by the pipeline, so a final name only ever holds
a complete file; the ledger (written by this client only) marks a file ``running`` before it is
submitted and ``done`` with its sha256 after; running the same command again skips files done
from the same source (sha256) with the same options, and redoes failed and interrupted ones.
A worker lost mid-file is handled by Dask (the scheduler runs its tasks elsewhere); a task that
still ends with a lost-worker error is submitted again up to ``retries`` times.
"""

from contextlib import nullcontext
from dataclasses import dataclass, field, replace
import os
import secrets
import time

from .. import media, partials
from ..jobs import RecipeMismatch
from ..dsp.errors import ParameterError
from .cluster import check_paths, connect
from .inputs import collect
from .ledger import Ledger
from .prepare import USE_EXACT, Settings, prepare_entries
from .progress import Progress
from .report import file_row, write_reports
from .tasks import convert_one

__all__ = ["BatchOptions", "BatchOutcome", "run_batch", "EXIT_ALL_DONE", "EXIT_BAD_INPUT",
           "EXIT_SOME_FAILED", "EXIT_INTERRUPTED"]

EXIT_ALL_DONE = 0
EXIT_BAD_INPUT = 2
EXIT_SOME_FAILED = 4
EXIT_INTERRUPTED = 130


@dataclass(frozen=True)
class BatchOptions:
    """A batch as the command line (or a test, or the benchmark) asks for it."""

    inputs: tuple
    settings: Settings
    scheduler: str | None = None        # Dask scheduler address; None: embedded cluster
    workers: int | None = None          # embedded cluster size; None: the machine's cores
    replace: bool = False               # replace outputs this batch did not make
    progress_line: bool = True
    json_events: bool = False
    retries: int = 2                    # resubmissions of a file whose worker was lost
    sheet: bool = True


@dataclass
class BatchOutcome:
    """Per-file rows (the report's), the exit code, the report paths and the phase timings."""

    rows: list
    exit_code: int
    reports: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    cluster: str = ""

    @property
    def counts(self):
        out = {"done": 0, "skipped": 0, "failed": 0}
        for r in self.rows:
            out[r["state"]] = out.get(r["state"], 0) + 1
        return out


def run_batch(options, *, client=None):
    """Run ``options`` (a :class:`BatchOptions`); returns a :class:`BatchOutcome`.

    ``client`` : an open :class:`distributed.Client` to use instead of connecting (the
    benchmark keeps one cluster for several runs).

    Raises
    ------
    ParameterError
        Bad input found before any work (exit code 2 at the command line).
    """
    settings = options.settings
    t0 = time.perf_counter()
    items = collect(options.inputs)
    out_dir = os.path.abspath(settings.out_dir)
    if os.path.exists(out_dir) and not os.path.isdir(out_dir):
        raise ParameterError(f"--out must be a folder; '{settings.out_dir}' is a file", "out")
    os.makedirs(out_dir, exist_ok=True)
    settings = replace(settings, out_dir=out_dir)
    entries, plans = prepare_entries(items, settings)
    timings = {"prepare_s": time.perf_counter() - t0}
    with Ledger(out_dir) as ledger:
        run_id = ledger.start_run()
        rows, todo = _triage(entries, ledger, replace_outputs=options.replace)
        progress = Progress(total_files=len(entries),
                            total_audio_s=sum(e.duration_s for e in todo),
                            line=options.progress_line, json_events=options.json_events)
        progress.start(files=len(entries), to_convert=len(todo),
                       already_done=sum(r["state"] == "skipped" for r in rows.values()),
                       refused=sum(r["state"] == "failed" for r in rows.values()))
        for e in entries:
            if e.name in rows:
                r = rows[e.name]
                progress.file_finished(e.name, state=r["state"], message=r["message"])
                if r["state"] == "failed":
                    progress.note(f"rateferry: error: {r['message']}")
        description = ""
        if todo:
            t1 = time.perf_counter()
            session = nullcontext((client, "the given Dask client")) if client is not None \
                else connect(scheduler=options.scheduler, workers=options.workers)
            with session as (dask_client, description):
                timings["cluster_s"] = time.perf_counter() - t1
                check_paths(dask_client, [e.job.source for e in todo], out_dir)
                t2 = time.perf_counter()
                progress.clock()
                rows.update(_convert(dask_client, todo, plans, ledger, progress, settings,
                                     retries=options.retries))
                timings["convert_s"] = time.perf_counter() - t2
        ordered = [rows[e.name] for e in entries]
        code = EXIT_SOME_FAILED if any(r["state"] == "failed" for r in ordered) \
            else EXIT_ALL_DONE
        t3 = time.perf_counter()
        reports = write_reports(out_dir, ordered, plans, cluster=description,
                                sheet=options.sheet)
        timings["report_s"] = time.perf_counter() - t3
        timings["total_s"] = time.perf_counter() - t0
        outcome = BatchOutcome(rows=ordered, exit_code=code, reports=reports, timings=timings,
                               cluster=description)
        ledger.finish_run(run_id, dict(counts=outcome.counts, timings=timings))
        progress.finish(counts=outcome.counts, exit_code=code, reports=reports)
    return outcome


def _triage(entries, ledger, *, replace_outputs):
    """Rows for files refused, failed to prepare or already done; the entries left to do."""
    rows, todo = {}, []
    for e in entries:
        source = e.item.source
        if e.error is not None:
            ledger.mark_failed(e.name, source_path=source, options_hash=e.options_hash,
                               message=e.error)
            rows[e.name] = file_row(e, state="failed", message=e.error)
            continue
        target = e.job.target
        row = ledger.get(e.name)
        exists = os.path.lexists(target)
        if exists and row is not None and row["state"] == "done" \
                and row["options_hash"] == e.options_hash \
                and ledger.output_unchanged(row, target) \
                and media.sha256_file(source) == row["source_sha256"]:
            rows[e.name] = file_row(e, state="skipped", figures=row["figures"],
                                    message="already done with this source and these options")
            continue
        # a file this batch was making when it was stopped (the worker may have finished
        # writing it, atomically, after the client died): ours to make again
        ours = row is not None and row["state"] == "running" \
            and row["options_hash"] == e.options_hash and row["source_path"] == source
        if exists and not ours and not replace_outputs:
            message = (f"'{e.name}' already exists in the output folder and this batch did not "
                       "make it from this source with these options; it was left as it is "
                       "(pass --replace to replace it)")
            rows[e.name] = file_row(e, state="failed", message=message)
            continue
        todo.append(e)
    return rows, todo


def _submit(client, entry, plan_future, settings, attempt):
    recipe = settings.recipe if entry.use == USE_EXACT else None
    key = f"rateferry-{entry.name}-{attempt}-{secrets.token_hex(4)}"
    return client.submit(convert_one, replace(entry.job, plan=None), plan_future, recipe,
                         key=key, pure=False)


def _convert(client, todo, plans, ledger, progress, settings, *, retries):
    """Submit every entry, follow ``as_completed``; returns rows by output name."""
    from distributed import as_completed
    for folder in sorted({os.path.dirname(os.path.abspath(e.job.target)) for e in todo}):
        partials.sweep(folder)       # an earlier run's worker died mid-file
    routes = {e.route for e in todo}
    # one copy of each design on every worker, shared by all the files of its route
    plan_futures = {k: client.scatter(plans[k], broadcast=True, hash=False) for k in routes}
    by_future, attempts = {}, {}
    for e in todo:
        ledger.mark_running(e.name, source_path=e.item.source, options_hash=e.options_hash)
        by_future[_submit(client, e, plan_futures[e.route], settings, 0)] = e
        attempts[e.name] = 0
    rows = {}
    pending = as_completed(list(by_future), loop=client.loop)
    try:
        for future in pending:
            e = by_future.pop(future)
            try:
                out = future.result()
            except Exception as exc:          # the task did not return: a lost worker, a bug
                attempts[e.name] += 1
                reason = f"{type(exc).__name__}: {exc}"
                if attempts[e.name] <= retries:
                    progress.note(f"rateferry: '{e.name}' is run again after {reason}")
                    # a lost worker can take the scattered design with it: a retry scatters
                    # it again (the same deterministic plan), whatever the task failed of
                    plan_futures[e.route] = client.scatter(plans[e.route], broadcast=True,
                                                           hash=False)
                    new = _submit(client, e, plan_futures[e.route], settings, attempts[e.name])
                    by_future[new] = e
                    pending.add(new)
                    continue
                out = dict(ok=False, message=f"the task for '{e.name}' failed on the cluster "
                                             f"({reason})")
            rows[e.name] = _record(e, out, ledger, progress)
    except KeyboardInterrupt:
        client.cancel(list(by_future))
        raise
    return rows


def _record(e, out, ledger, progress):
    if not out["ok"]:
        ledger.mark_failed(e.name, source_path=e.item.source, options_hash=e.options_hash,
                           message=out["message"])
        progress.file_finished(e.name, state="failed", message=out["message"])
        progress.note(f"rateferry: error: {out['message']}")
        return file_row(e, state="failed", message=out["message"], worker=out.get("worker"))
    figs = out["figures"]
    if "recipe" in out and not out["recipe"]["reproduces"]:
        # as convert --recipe: the output is kept for inspection, the file counts as failed
        diffs = [(d["field"], d["recipe"], d["rerun"]) for d in out["recipe"]["differences"]]
        out = dict(out, ok=False, message=RecipeMismatch(diffs).message + "; the output was "
                   "kept for inspection")
        return _record(e, out, ledger, progress)
    ledger.mark_done(e.name, source_path=e.item.source, options_hash=e.options_hash,
                     figures=figs, output_path=e.job.target)
    extra = dict(worker=out.get("worker"), task_s=out.get("task_s"))
    if "recipe" in out:
        extra["reproduces_recipe"] = out["recipe"]["reproduces"]
    progress.file_finished(e.name, state="done", audio_s=e.duration_s,
                           output_sha256=figs["output_sha256"])
    return file_row(e, state="done", figures=figs, **extra)
