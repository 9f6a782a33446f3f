"""Background stages for streaming work: numpy, scipy, BLAS and libsndfile release the GIL in
their inner loops, so a reader, a converter, meters and a writer on their own threads overlap on
separate cores. Bounded queues keep memory flat; an error in a stage is raised in the caller."""

import contextlib
import queue
import threading

from threadpoolctl import OpenBLASController, threadpool_limits

__all__ = ["Background", "Stages", "prefetch", "one_blas_thread"]

_STOP = object()


class Background:
    """One worker thread applying ``fn`` to items in order, through a bounded queue.

    numpy, scipy and libsndfile release the GIL in their inner loops, so the meters, the
    encoder and the converter overlap on separate cores. The queue bounds memory; an error in
    the worker is raised in the caller at the next submit or at finish.
    """

    def __init__(self, fn, *, depth=4, name="rateferry-stage"):
        self._fn = fn
        self._q = queue.Queue(maxsize=depth)
        self._error = None
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def _run(self):
        while True:
            item = self._q.get()
            if item is _STOP:
                return
            if self._error is None:
                try:
                    self._fn(item)
                except BaseException as exc:   # handed to the caller
                    self._error = exc

    def submit(self, item):
        if self._error is not None:
            raise self._error
        self._q.put(item)

    def finish(self):
        self._q.put(_STOP)
        self._thread.join()
        if self._error is not None:
            raise self._error

    def abort(self):
        self.leave()
        self._thread.join()

    def leave(self):
        """Let the worker end after what it has in hand, without waiting for it (its thread
        ends then, rather than waiting for more work that will never come)."""
        self._q.put(_STOP)


class Stages:
    """Background stages that finish (or abort) together, the last added first."""

    def __init__(self):
        self._stages = []

    def add(self, fn, name):
        stage = Background(fn, name=name)
        self._stages.append(stage)
        return stage

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        stages, self._stages = self._stages[::-1], []
        if exc_type is not None:
            for stage in stages:
                stage.abort()
            return False
        errors = []
        for stage in stages:
            try:
                stage.finish()
            except BaseException as err:
                errors.append(err)
        if errors:
            raise errors[0]
        return False


def prefetch(blocks, *, depth=3):
    """Iterate ``blocks`` (a generator) in a reader thread, ``depth`` blocks ahead."""
    q = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def run():
        try:
            for item in blocks:
                while not stop.is_set():
                    try:
                        q.put(("block", item), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    break
            q.put(("end", None))
        except BaseException as exc:
            q.put(("error", exc))
        finally:
            blocks.close()

    thread = threading.Thread(target=run, name="rateferry-reader", daemon=True)
    thread.start()
    try:
        while True:
            kind, item = q.get()
            if kind == "block":
                yield item
            elif kind == "end":
                return
            else:
                raise item
    finally:
        stop.set()
        while thread.is_alive():
            try:
                q.get(timeout=0.1)
            except queue.Empty:
                pass
        thread.join()


_blas_lock = threading.Lock()
_blas_users = 0
_blas_limiter = None


@contextlib.contextmanager
def one_blas_thread():
    """Hold the BLAS library to one thread while any caller is inside, process wide.

    The limit is one setting for the whole process, so a plain ``threadpool_limits`` block
    ending in one thread (a conversion, the spectra of a page request) would give BLAS its
    threads back while another thread's conversion still runs; and BLAS rounds the last bit
    of some products differently on two threads than on one, so that conversion's output
    would then depend on what else ran beside it. Here the first caller in sets the limit and
    the last one out restores it. Streaming stages run on their own threads anyway: BLAS's
    own threads would only compete with them for the cores.
    """
    global _blas_users, _blas_limiter
    with _blas_lock:
        if _blas_users == 0:
            _blas_limiter = _as_any_thread(lambda: threadpool_limits(limits=1, user_api="blas"))
        _blas_users += 1
    try:
        yield
    finally:
        with _blas_lock:
            _blas_users -= 1
            if _blas_users == 0:
                _as_any_thread(_blas_limiter.restore_original_limits)
                _blas_limiter = None


def _as_any_thread(change):
    """Make a change of OpenBLAS's thread count from whichever thread this is.

    threadpoolctl (3.8) lets only one "controlling" thread change OpenBLAS's process-wide
    pool, the first to change it while no other is alive, and silently ignores any other: once
    the main thread has measured a file, a request's limit on its own thread did nothing, and
    the analyses and conversions of the page's requests ran on two BLAS threads (several of
    them calling BLAS at once fought over its one pool: an upload's analysis took 10 times as
    long). ``_blas_lock`` orders our changes, so each is made by the thread that makes it;
    no thread is left in control afterwards.
    """
    release = getattr(OpenBLASController, "clear_controlling_thread", None)
    if release is None:                # an older threadpoolctl: any thread may change it
        return change()
    release(force=True)
    try:
        return change()
    finally:
        release(force=True)
