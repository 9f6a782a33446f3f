"""The web app's background conversions: a small thread pool whose progress, results and
errors are written to the store (:mod:`webapp.store`), so polling, Server-Sent Events and a
restarted server all read the same row."""

from concurrent.futures import ThreadPoolExecutor
import logging
import math
import threading
import time

__all__ = ["ConversionPool"]

log = logging.getLogger(__name__)

_PROGRESS_INTERVAL_S = 0.2


class _Progress:
    """Progress callback for :func:`webapp.pipeline.convert_file`, throttled into the store."""

    def __init__(self, db, conversion_id, interval_s=_PROGRESS_INTERVAL_S):
        self.db = db
        self.conversion_id = conversion_id
        self.interval_s = interval_s
        self.t0 = time.perf_counter()
        self._last = -math.inf
        self.latest = None

    def figures(self, fraction, done, total):
        elapsed = time.perf_counter() - self.t0
        eta = elapsed * (1.0 - fraction) / fraction if fraction > 0 else None
        return dict(percent=round(100.0 * fraction, 2), frames_done=int(done),
                    frames_total=int(total), eta_s=None if eta is None else round(eta, 3),
                    elapsed_s=round(elapsed, 3))

    def __call__(self, fraction, done, total):
        self.latest = self.figures(fraction, done, total)
        now = time.perf_counter()
        if now - self._last >= self.interval_s:
            self._last = now
            self.db.set_progress(self.conversion_id, self.latest)


class ConversionPool:
    """Runs conversions in the background, a few at a time.

    Parameters
    ----------
    store : Store
    workers : int, optional
        Conversions that run at once. Default is 2.
    on_result : callable(conversion_id, ConversionResult), optional
        Called after a conversion is done and stored (the web app keeps the result objects for
        design sheets and writes the recipe here).
    """

    def __init__(self, store, *, workers=2, on_result=None):
        self.store = store
        self.on_result = on_result
        self._executor = ThreadPoolExecutor(max_workers=workers,
                                            thread_name_prefix="rateferry-conversion")
        self._cancel = {}
        self._lock = threading.Lock()
        self._futures = {}

    def submit(self, conversion_id, run):
        """Queue ``run(progress, cancel) -> ConversionResult`` for ``conversion_id``.

        ``run`` receives the progress callback and the cancel :class:`threading.Event` to pass
        on to :func:`webapp.pipeline.convert_file`.
        """
        event = threading.Event()
        with self._lock:
            self._cancel[conversion_id] = event
            fut = self._executor.submit(self._work, conversion_id, run, event)
            self._futures[conversion_id] = fut
        return fut

    def cancel(self, conversion_id):
        """Ask a queued or running conversion to stop; returns the status afterwards."""
        with self._lock:
            event = self._cancel.get(conversion_id)
        if event is not None:
            event.set()
        with self.store.open() as db:
            return db.request_cancel(conversion_id)

    def wait(self, conversion_id, timeout=None):
        """Block until the conversion's worker has finished (for tests and the CLI)."""
        with self._lock:
            fut = self._futures.get(conversion_id)
        if fut is not None:
            fut.exception(timeout=timeout)

    def shutdown(self, *, cancel=True):
        """Stop the pool; with ``cancel`` running conversions are asked to stop first."""
        if cancel:
            with self._lock:
                events = list(self._cancel.values())
            for e in events:
                e.set()
        self._executor.shutdown(wait=True, cancel_futures=cancel)

    def _work(self, conversion_id, run, event):
        from .dsp.errors import RateferryError
        from .pipeline import Cancelled
        from .jsontools import jsonable
        try:
            with self.store.open() as db:
                if event.is_set() or not db.start_conversion(conversion_id):
                    return
                progress = _Progress(db, conversion_id)
                try:
                    result = run(progress, event)
                except Cancelled as exc:
                    db.finish_conversion(conversion_id, status="cancelled",
                                         error=dict(message=exc.message, field=exc.field),
                                         progress=progress.latest)
                    return
                except RateferryError as exc:
                    db.finish_conversion(conversion_id, status="failed",
                                         error=dict(message=exc.message, field=exc.field),
                                         progress=progress.latest)
                    return
                except Exception as exc:  # a bug: keep the server alive and say so
                    log.exception("conversion %s failed", conversion_id)
                    db.finish_conversion(
                        conversion_id, status="failed",
                        error=dict(message=f"internal error: {type(exc).__name__}",
                                   field="conversion"),
                        progress=progress.latest)
                    return
                recipe_path = None
                if self.on_result is not None:
                    try:
                        recipe_path = self.on_result(conversion_id, result)
                    except Exception:
                        log.exception("after-conversion hook failed for %s", conversion_id)
                total = progress.latest["frames_total"] if progress.latest else result.frames_in
                final = progress.figures(1.0, total, total)
                db.finish_conversion(conversion_id, status="done",
                                     figures=jsonable(result.figures()), progress=final,
                                     recipe_path=recipe_path)
        finally:
            with self._lock:
                self._cancel.pop(conversion_id, None)
