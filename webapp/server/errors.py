"""One error handler: every failure leaves the API as JSON ``{"error": {"message", "field"}}``.

ParameterError and AudioFileError (the core's errors) are 400s; :class:`ApiError` carries its
own status (403 security, 404 unknown id, 409 wrong state, 415 file type); werkzeug's HTTP
errors (404 route, 405 method, 413 too large) keep their status. Anything else is a bug: it is
logged with its traceback and answered with a 500 JSON that holds no traceback.
"""

import logging

from flask import jsonify
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from webapp.dsp.errors import RateferryError

__all__ = ["ApiError", "error_response", "register_error_handlers", "too_large_message"]

log = logging.getLogger(__name__)


class ApiError(Exception):
    """An error with an HTTP status, a message (the rule and the value) and a field."""

    def __init__(self, status, message, field=None, *, headers=None):
        super().__init__(message)
        self.status = int(status)
        self.message = message
        self.field = field
        self.headers = dict(headers or {})


def too_large_message(limit):
    """The one 413 message, from the app and from waitress (:mod:`.wsgi`) alike."""
    return (f"the upload is larger than the limit of {limit} bytes" if limit
            else "the upload is too large")


def error_response(status, message, field=None):
    response = jsonify(error=dict(message=message, field=field))
    response.status_code = status
    return response


def register_error_handlers(app):
    """Install the handlers on ``app``."""

    @app.errorhandler(ApiError)
    def _api_error(exc):
        response = error_response(exc.status, exc.message, exc.field)
        response.headers.update(exc.headers)
        return response

    @app.errorhandler(RateferryError)
    def _rateferry_error(exc):
        return error_response(400, exc.message, exc.field)

    @app.errorhandler(RequestEntityTooLarge)
    def _too_large(exc):
        return error_response(413, too_large_message(app.config.get("MAX_CONTENT_LENGTH")),
                              "file")

    @app.errorhandler(HTTPException)
    def _http_error(exc):
        return error_response(exc.code or 500, exc.description or exc.name, None)

    @app.errorhandler(Exception)
    def _bug(exc):
        log.exception("unhandled error")
        return error_response(500, "internal error: the server hit a bug; see its log", None)
