"""Real-browser fixtures: the real server on a free loopback port, Debian's chromium via Playwright.

No browser is ever downloaded. When /usr/bin/chromium (or the playwright package) is missing
the tests are skipped, unless RATEFERRY_REQUIRE_BROWSER=1 asks for a failure instead.
Screenshots of the main states go to test-artifacts/ (gitignored).
"""

import os
import socket
import threading

import pytest

from webapp.server import SOURCE_ROOT, create_app

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--disable-sync", "--no-first-run",
    "--autoplay-policy=no-user-gesture-required",
]
ARTIFACTS = os.path.join(SOURCE_ROOT, "test-artifacts")
VIEWPORT = {"width": 1500, "height": 1000}
LAPTOP = {"width": 1280, "height": 800}


def pytest_collection_modifyitems(items):
    here = os.path.dirname(__file__)
    for item in items:
        if str(item.fspath).startswith(here):
            item.add_marker(pytest.mark.browser)


def _unavailable(reason):
    if os.environ.get("RATEFERRY_REQUIRE_BROWSER") == "1":
        pytest.fail(f"{reason} (RATEFERRY_REQUIRE_BROWSER=1)")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def browser():
    if not os.path.exists(CHROMIUM):
        _unavailable(f"{CHROMIUM} is not installed (apt-get install chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _unavailable("the playwright package is not installed")
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield b
        b.close()


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="session")
def server(tmp_path_factory):
    """The real app over a temporary instance, served in a thread; yields its base URL."""
    from werkzeug.serving import WSGIRequestHandler, make_server

    class QuietHandler(WSGIRequestHandler):
        def log(self, *args, **kwargs):   # keep the test output readable
            pass

    port = _free_port()
    instance = tmp_path_factory.mktemp("rateferry-instance")
    app = create_app({"INSTANCE_PATH": str(instance), "SERVER_PORT": port, "WORKERS": 2,
                      "SSE_INTERVAL_S": 0.1})
    httpd = make_server("127.0.0.1", port, app, threaded=True, request_handler=QuietHandler)
    thread = threading.Thread(target=httpd.serve_forever, name="rateferry-test-server",
                              daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        httpd.shutdown()
        thread.join(timeout=10)
        app.extensions["rateferry"].shutdown()


@pytest.fixture(scope="session")
def context(browser):
    """One browser context for the session, so plotly.js (4.8 MB) is parsed from its cache."""
    ctx = browser.new_context(viewport=VIEWPORT, accept_downloads=True)
    yield ctx
    ctx.close()


@pytest.fixture(scope="session")
def laptop_context(browser):
    """A 1280 x 800 browser context: a laptop screen."""
    ctx = browser.new_context(viewport=LAPTOP, accept_downloads=True)
    yield ctx
    ctx.close()


@pytest.fixture
def laptop_page(laptop_context, server):
    """A fresh 1280 x 800 page with the demo loaded, from the default settings; the test fails
    when the page threw."""
    pg, errors = _fresh_page(laptop_context, server, timeout_ms=60000)
    pg.wait_for_selector("body[data-ready='true']")
    yield pg
    pg.close()
    assert not errors, f"the page threw: {errors}"


def _fresh_page(context, server, *, timeout_ms):
    """A new page on the app from the default settings (this browser's remembered settings are
    cleared first), its errors collected; returns (page, errors)."""
    pg = context.new_page()
    errors = []
    pg.on("pageerror", lambda exc: errors.append(str(exc)))
    pg.set_default_timeout(timeout_ms)
    pg.goto(server + "/api/health")
    pg.evaluate("() => window.localStorage.clear()")
    pg.goto(server + "/")
    return pg, errors


def open_page(context, server):
    """A fresh page with the demo loaded and its first spectra drawn, starting from the
    defaults; returns (page, errors)."""
    pg, errors = _fresh_page(context, server, timeout_ms=30000)
    wait_ready(pg)
    return pg, errors


def wait_ready(pg):
    pg.wait_for_selector("body[data-ready='true']")
    pg.wait_for_function("() => { const p = document.getElementById('plot-spectra'); "
                         "return p && p.data && p.data.length > 0; }")


@pytest.fixture
def ready():
    """ready(page): wait until the (re)loaded page is drawn."""
    return wait_ready


@pytest.fixture
def page(context, server):
    """A fresh page with the demo loaded and its first spectra drawn; fails on page errors."""
    pg, errors = open_page(context, server)
    yield pg
    pg.close()
    assert not errors, f"the page threw: {errors}"


@pytest.fixture
def laptop(laptop_context, server):
    """The same at 1280 x 800."""
    pg, errors = open_page(laptop_context, server)
    yield pg
    pg.close()
    assert not errors, f"the page threw: {errors}"


def _shooter(page):
    os.makedirs(ARTIFACTS, exist_ok=True)

    def take(name, top=True):
        path = os.path.join(ARTIFACTS, f"{name}.png")
        if top:
            page.evaluate("window.scrollTo(0, 0)")
        page.screenshot(path=path)
        return path

    return take


@pytest.fixture
def shot(page):
    """shot(name, top=True): a screenshot of the visible page in test-artifacts/<name>.png
    (scrolled to the top first unless top=False)."""
    return _shooter(page)


@pytest.fixture
def laptop_shot(laptop):
    """shot() for the 1280 x 800 page."""
    return _shooter(laptop)
