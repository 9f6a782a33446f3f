"""``rateferry serve``: waitress on the loopback address; Flask's server only with debug."""

import errno
import socket
import sys
import threading
import webbrowser

from webapp.dsp.errors import ParameterError

from .wsgi import DEFAULT_THREADS, make_server

__all__ = ["DEFAULT_PORT", "LOOPBACK_HOSTS", "serve", "port_is_free"]

DEFAULT_PORT = 8765
LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")
EXIT_BAD_INPUT = 2


def port_is_free(host, port):
    """True when ``host:port`` can be bound now."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as s:
        try:
            s.bind((host, port))
        except OSError as exc:
            if exc.errno in (errno.EADDRINUSE, errno.EACCES):
                return False
            raise
    return True


def serve(*, host="127.0.0.1", port=DEFAULT_PORT, open_browser=True, debug=False,
          instance_path=None, threads=DEFAULT_THREADS, announce=True):
    """Run the web app until interrupted; returns an exit code.

    Parameters
    ----------
    host : str
        A loopback address or name only (127.0.0.1, localhost, ::1): the app is for this
        machine, and its Host check refuses other names anyway.
    port : int
        Default 8765. A busy port ends with a clear message and exit code 2.
    open_browser : bool
        Open the page in the default browser once the server listens.
    debug : bool
        Flask's development server with debugging instead of waitress.
    instance_path : str, optional
        The data folder (default :func:`webapp.store.default_instance_path`).
    announce : bool
        Say where the page is on stderr (the command's ``--silent`` turns it off).
    """
    if host not in LOOPBACK_HOSTS:
        raise ParameterError(f"host must be one of {', '.join(LOOPBACK_HOSTS)} (the server is "
                             f"for this machine only), got {host!r}", "host")
    if isinstance(port, bool) or not isinstance(port, int) or not 1 <= port <= 65535:
        raise ParameterError(f"port must be a whole number from 1 to 65535, got {port!r}", "port")
    bind = "::1" if host == "::1" else "127.0.0.1"
    if not port_is_free(bind, port):
        sys.stderr.write(f"rateferry: error: port {port} on {bind} is already in use (another "
                         f"rateferry, or another program); choose another with --port\n")
        return EXIT_BAD_INPUT
    from . import create_app
    app = create_app(instance_path=instance_path)
    app.config["SERVER_PORT"] = port
    shown = f"[{bind}]" if ":" in bind else bind
    url = f"http://{shown}:{port}/"
    if announce:
        sys.stderr.write(f"Rateferry {app.config['VERSION']} at {url} (data in "
                         f"{app.instance_path}); Ctrl+C stops it\n")
    if open_browser:
        threading.Timer(0.8, webbrowser.open, args=(url,)).start()
    try:
        if debug:
            app.run(host=bind, port=port, debug=True, use_reloader=False, threaded=True)
        else:
            server = make_server(app, host=bind, port=port, threads=threads,
                                 channel_timeout=120)
            server.run()
    except KeyboardInterrupt:
        pass
    finally:
        app.extensions["rateferry"].shutdown()
    return 0
