"""Hardening of a server that only the local user should reach.

Any web page the user visits can make the browser send requests to 127.0.0.1, and a DNS
rebinding attack can make a hostile name resolve there. So, on every request:

* the ``Host`` header must be a loopback name or address (``127.0.0.1``, ``localhost``,
  ``[::1]``) with the served port (``SERVER_PORT``; without a port when it is None, as with the
  test client) - else 403;
* a state-changing request (POST, PUT, PATCH, DELETE) must come from the page itself: an
  ``Origin`` header, when present, must be ``http://<that host>``; a ``Sec-Fetch-Site`` header,
  when present, must not say ``cross-site``; and the header ``X-Rateferry-Token`` must carry the
  token generated at start-up and embedded in the page - else 403;
* no CORS header is ever sent (any ``Access-Control-*`` header is removed), so other origins
  can't read the answers.
"""

import hmac

from flask import request

from .errors import error_response

__all__ = ["LOOPBACK_NAMES", "TOKEN_HEADER", "STATE_CHANGING", "allowed_hosts", "init_security"]

LOOPBACK_NAMES = ("127.0.0.1", "localhost", "[::1]")
TOKEN_HEADER = "X-Rateferry-Token"
STATE_CHANGING = frozenset({"POST", "PUT", "PATCH", "DELETE"})


def allowed_hosts(port):
    """The Host header values accepted for ``port`` (None: the names alone)."""
    if port is None:
        return frozenset(LOOPBACK_NAMES)
    hosts = {f"{name}:{int(port)}" for name in LOOPBACK_NAMES}
    if int(port) == 80:
        hosts.update(LOOPBACK_NAMES)
    return frozenset(hosts)


def init_security(app):
    """Install the checks and the response headers on ``app``."""

    @app.before_request
    def _check_request():
        hosts = allowed_hosts(app.config.get("SERVER_PORT"))
        host = (request.headers.get("Host") or "").strip().lower()
        if host not in hosts:
            return error_response(
                403, f"Host must be one of {', '.join(sorted(hosts))}; got {host or 'none'!r} "
                "(this server answers only the local machine)", "host")
        if request.method not in STATE_CHANGING:
            return None
        origin = request.headers.get("Origin")
        if origin is not None and origin.strip().lower() != f"http://{host}":
            return error_response(
                403, f"Origin must be http://{host} (this page); got {origin!r}", "origin")
        if (request.headers.get("Sec-Fetch-Site") or "").lower() == "cross-site":
            return error_response(403, "cross-site requests are refused", "origin")
        token = request.headers.get(TOKEN_HEADER, "")
        if not hmac.compare_digest(token.encode(), app.config["PAGE_TOKEN"].encode()):
            return error_response(
                403, f"the {TOKEN_HEADER} header must carry this page's token "
                f"({'missing' if not token else 'wrong token'})", "token")
        return None

    @app.after_request
    def _headers(response):
        for name in [h for h in response.headers.keys() if h.lower().startswith("access-control-")]:
            del response.headers[name]
        response.headers["X-Content-Type-Options"] = "nosniff"
        response.headers["Referrer-Policy"] = "no-referrer"
        response.headers["X-Frame-Options"] = "DENY"
        response.headers["Cross-Origin-Resource-Policy"] = "same-origin"
        if response.mimetype == "text/html":
            response.headers.setdefault(
                "Content-Security-Policy",
                "frame-ancestors 'none'; object-src 'none'; base-uri 'none'; "
                "form-action 'self'")
        return response
