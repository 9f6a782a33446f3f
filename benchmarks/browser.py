"""The real page for the benchmarks that time it: the app served on 127.0.0.1 from a fresh
instance folder, and chromium (Debian's, through Playwright) with the page loaded and ready.

Not a benchmark itself (the runner discovers only ``bench_*.py``).
"""

import contextlib
import os
import socket
import tempfile
import threading

CHROMIUM = "/usr/bin/chromium"


def available():
    """True when chromium and Playwright are both here."""
    if not os.path.exists(CHROMIUM):
        return False
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        return False
    return True


@contextlib.contextmanager
def ready_page(*, timeout_ms):
    """Yield a Playwright page (1500 x 1000) on a freshly served app, once the page says it is
    ready; the server, the browser and the app's workers are closed afterwards."""
    from playwright.sync_api import sync_playwright
    from werkzeug.serving import WSGIRequestHandler, make_server
    from webapp.server import create_app

    class Quiet(WSGIRequestHandler):
        def log(self, *args, **kwargs):
            pass

    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with tempfile.TemporaryDirectory() as inst:
        app = create_app({"INSTANCE_PATH": inst, "SERVER_PORT": port})
        httpd = make_server("127.0.0.1", port, app, threaded=True, request_handler=Quiet)
        thread = threading.Thread(target=httpd.serve_forever, daemon=True)
        thread.start()
        try:
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path=CHROMIUM,
                                            args=["--no-sandbox", "--disable-gpu"])
                page = browser.new_page(viewport={"width": 1500, "height": 1000})
                page.set_default_timeout(timeout_ms)
                page.goto(f"http://127.0.0.1:{port}/")
                page.wait_for_selector("body[data-ready='true']")
                try:
                    yield page
                finally:
                    browser.close()
        finally:
            httpd.shutdown()
            thread.join(timeout=10)
            app.extensions["rateferry"].shutdown()
