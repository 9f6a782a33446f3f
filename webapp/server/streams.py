"""A bound on open progress streams, so they can't take every server thread.

An event stream holds one waitress thread for as long as the browser listens. Without a bound,
ten open pages (or one page that never closes its streams) hold all the threads and a plain
``GET /api/health`` waits. :class:`StreamSlots` admits at most ``SSE_MAX_STREAMS`` at once (a
few less than the server's threads); an excess stream is refused at once with 429 (Too Many
Requests) and ``Retry-After``, and the page then polls ``GET /api/conversions/<id>`` instead.
(429, not 503: the server is well, this one client has enough streams open; no request earns a
5xx.) A stream also
ends after ``SSE_MAX_S`` seconds; the browser's EventSource reconnects by itself.
"""

import threading

from .errors import ApiError

__all__ = ["StreamSlots", "RETRY_AFTER_S"]

RETRY_AFTER_S = 5


class StreamSlots:
    """At most ``limit`` open streams; :meth:`take` returns a release function or raises 429."""

    def __init__(self, limit):
        self.limit = int(limit)
        self._sem = threading.BoundedSemaphore(self.limit)
        self._lock = threading.Lock()
        self.open = 0

    def take(self):
        if not self._sem.acquire(blocking=False):
            raise ApiError(429, f"too many progress streams are open (at most {self.limit}); "
                                "poll the conversion instead, or retry later", "events",
                           headers={"Retry-After": str(RETRY_AFTER_S)})
        with self._lock:
            self.open += 1
        released = threading.Event()

        def release():
            if released.is_set():
                return
            released.set()
            with self._lock:
                self.open -= 1
            self._sem.release()

        return release
