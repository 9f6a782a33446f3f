"""The app on waitress: one upload limit, and waitress's own refusals answered as JSON too.

waitress refuses some requests before the app sees them (a body over ``max_request_body_size``,
a malformed request line, headers too large). Its answers are text/plain; :class:`JsonErrorTask`
gives them the app's shape, ``{"error": {"message", "field"}}``, so the page reads every
refusal the same way. The body limit is the app's ``MAX_CONTENT_LENGTH``: the same number holds
for a declared Content-Length (the app refuses it) and a chunked body (waitress stops reading).
"""

import json

from waitress.channel import HTTPChannel
from waitress.server import create_server
from waitress.task import ErrorTask

from .errors import too_large_message

__all__ = ["DEFAULT_THREADS", "JsonErrorTask", "make_server"]

#: waitress worker threads: progress streams take at most SSE_MAX_STREAMS of them.
DEFAULT_THREADS = 16


class JsonErrorTask(ErrorTask):
    """waitress's error response, as the app's JSON error."""

    def execute(self):
        e = self.request.error
        limit = self.channel.server.adj.max_request_body_size
        if e.code == 413:
            message, field = too_large_message(limit), "file"
        else:
            message, field = f"{e.reason.lower()}: {e.body}", None
        body = json.dumps(dict(error=dict(message=message, field=field))).encode()
        self.status = f"{e.code} {e.reason}"
        self.response_headers.extend([("Content-Type", "application/json"),
                                      ("X-Content-Type-Options", "nosniff")])
        self.set_close_on_finish()
        self.content_length = len(body)
        self.write(body)


class JsonErrorChannel(HTTPChannel):
    error_task_class = JsonErrorTask


def make_server(app, *, host="127.0.0.1", port=0, threads=DEFAULT_THREADS, **options):
    """A waitress server for ``app`` (not yet running: call ``.run()``; ``.close()`` stops it).

    ``port=0`` picks a free port (read it from ``server.effective_port``).
    """
    limit = app.config.get("MAX_CONTENT_LENGTH")
    if limit:
        options.setdefault("max_request_body_size", int(limit))
    server = create_server(app, host=host, port=port, threads=threads, ident="rateferry",
                           **options)
    server.channel_class = JsonErrorChannel
    return server
