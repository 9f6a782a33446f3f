"""The local web app: ``create_app(test_config=None)`` in the shape of Flask's tutorial.

Config (``app.config``; defaults below, ``instance/config.py`` or ``test_config`` override):

``MAX_CONTENT_LENGTH``  upload limit in bytes, default 2 GiB (2147483648): a two-hour 48 kHz
                        24-bit stereo WAV is 2073600000 bytes of audio plus its header.
``SERVER_PORT``         the port the Host header must carry (None: no port, as the test client).
``PAGE_TOKEN``          per-start token state-changing requests must send (generated).
``LOAD_DEMO``           register the demo recording at start-up (default True).
``DEMO_MEDIA``          folder of demo recordings (default: :data:`webapp.assets.DEMO_MEDIA_FOLDER`).
``STATIC_FOLDER``       the page's files (default: :data:`webapp.assets.STATIC_FOLDER`).
``WORKERS``             conversions that run at once (default 2).
``DESIGN_CACHE_SIZE``   designs kept in memory (default 24).
``EXCERPT_MAX_S``       longest listening rendition / spectrum excerpt (default 60 s).
``ANALYSE_SYNC_MAX_S``  uploads up to this long are measured before the upload answers; longer
                        ones are measured in the background (default 600 s).
``SSE_INTERVAL_S``      progress event interval (default 0.25 s).
``SSE_MAX_STREAMS``     progress streams open at once (default 6; waitress runs 16 threads);
                        more are answered 429 with Retry-After and the page polls.
``SSE_MAX_S``           a progress stream ends after this long (default 600 s); the browser
                        reconnects.
"""

from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
import logging
import os
import secrets
import threading

from flask import Flask

from webapp import __version__
from webapp.assets import DEMO_MEDIA_FOLDER, STATIC_FOLDER
from webapp.store import Store, default_instance_path
from webapp.workers import ConversionPool

__all__ = ["create_app", "State", "DEFAULT_MAX_CONTENT_LENGTH", "SOURCE_ROOT"]

log = logging.getLogger(__name__)

SOURCE_ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEFAULT_MAX_CONTENT_LENGTH = 2**31
_RESULTS_KEPT = 32


def _plotly_js():
    import plotly
    return os.path.join(os.path.dirname(plotly.__file__), "package_data", "plotly.min.js")


class State:
    """What one app holds beside Flask: the store, the worker pool and the caches."""

    def __init__(self, app):
        from webapp.designs import DesignCache
        self.config = app.config
        self.store = Store(app.instance_path)
        swept = self.store.sweep_partials()
        if swept:
            log.warning("removed %d partial file(s) left by a crash", len(swept))
        self.interrupted = self.store.recover_interrupted()
        if self.interrupted:
            log.warning("marked %d interrupted conversion(s) failed", len(self.interrupted))
        self.cache = DesignCache(size=app.config["DESIGN_CACHE_SIZE"])
        self.results = OrderedDict()
        self._results_lock = threading.Lock()
        self.pool = ConversionPool(self.store, workers=app.config["WORKERS"],
                                   on_result=self._on_result)
        self.background = ThreadPoolExecutor(max_workers=1,
                                             thread_name_prefix="rateferry-analysis")
        # work started ahead for the page (an upload's spectra, beside its analysis)
        self.ahead = ThreadPoolExecutor(max_workers=1, thread_name_prefix="rateferry-ahead")
        from .library import RunningAnalyses
        self.analyses = RunningAnalyses()
        self.demo_id = None
        self.demo_pair = None
        from .streams import StreamSlots
        self.streams = StreamSlots(app.config["SSE_MAX_STREAMS"])

    def _on_result(self, conversion_id, result):
        """Keep the result for design sheets; write the recipe beside the output."""
        with self._results_lock:
            self.results[conversion_id] = result
            while len(self.results) > _RESULTS_KEPT:
                self.results.popitem(last=False)
        from webapp.recipe import write_recipe
        path = os.path.join(self.store.outputs, f"{conversion_id}_recipe.json")
        with self.store.open() as db:
            conv = db.get_conversion(conversion_id)
            rec = db.get_recording(conv["recording_id"]) if conv else None
        write_recipe(result, path, source_name=rec["name"] if rec else None,
                           output_name=conv["download_name"] if conv else None)
        return path

    def result(self, conversion_id):
        with self._results_lock:
            return self.results.get(conversion_id)

    def shutdown(self):
        """Stop the workers (running conversions are cancelled) and the helper threads."""
        self.pool.shutdown(cancel=True)
        self.background.shutdown(wait=True, cancel_futures=True)
        self.ahead.shutdown(wait=True, cancel_futures=True)
        self.cache.shutdown()


def create_app(test_config=None, *, instance_path=None):
    """Create the Rateferry web app.

    Parameters
    ----------
    test_config : dict, optional
        Config that replaces ``instance/config.py``; ``INSTANCE_PATH`` in it picks the folder.
    instance_path : str, optional
        The instance folder (data, database). Default: ``test_config["INSTANCE_PATH"]``, else
        :func:`webapp.store.default_instance_path`.

    Returns
    -------
    flask.Flask
        With ``app.extensions["rateferry"]`` holding the :class:`State`.
    """
    test_config = dict(test_config or {}) if test_config is not None else None
    instance_path = os.path.abspath(instance_path or (test_config or {}).get("INSTANCE_PATH")
                                    or default_instance_path())
    static_folder = (test_config or {}).get("STATIC_FOLDER") or STATIC_FOLDER
    app = Flask(__name__, instance_path=instance_path, instance_relative_config=True,
                static_folder=static_folder, static_url_path="/static")
    app.config.from_mapping(
        MAX_CONTENT_LENGTH=DEFAULT_MAX_CONTENT_LENGTH,
        SERVER_PORT=None,
        PAGE_TOKEN=secrets.token_urlsafe(32),
        LOAD_DEMO=True,
        DEMO_MEDIA=DEMO_MEDIA_FOLDER,
        STATIC_FOLDER=static_folder,
        PLOTLY_JS=_plotly_js(),
        WORKERS=2,
        DESIGN_CACHE_SIZE=24,
        EXCERPT_MAX_S=60.0,
        ANALYSE_SYNC_MAX_S=600.0,
        SSE_INTERVAL_S=0.25,
        SSE_MAX_STREAMS=6,
        SSE_MAX_S=600.0,
        VERSION=__version__,
    )
    if test_config is None:
        app.config.from_pyfile("config.py", silent=True)
    else:
        app.config.from_mapping(test_config)
    app.json.sort_keys = False
    os.makedirs(app.instance_path, exist_ok=True)

    from .uploads import UploadRequest
    app.request_class = UploadRequest

    state = State(app)
    app.extensions["rateferry"] = state

    from . import db, errors, security
    db.init_db(app)
    errors.register_error_handlers(app)
    security.init_security(app)

    from . import (api, batches, conversions_api, designs_api, drift_api, listening_api, page,
                   recordings_api)
    app.register_blueprint(api.bp)
    app.register_blueprint(conversions_api.bp)
    app.register_blueprint(recordings_api.bp)
    app.register_blueprint(designs_api.bp)
    app.register_blueprint(listening_api.bp)
    app.register_blueprint(batches.bp)
    app.register_blueprint(drift_api.bp)
    app.register_blueprint(page.bp)

    if app.config["LOAD_DEMO"]:
        from .library import register_demo, register_demo_pair
        state.demo_id = register_demo(state.store, app.config["DEMO_MEDIA"])
        state.demo_pair = register_demo_pair(state.store, app.config["DEMO_MEDIA"])
    return app
