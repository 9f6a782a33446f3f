"""Fixtures for the web app: an app over a temporary instance, its client, real audio bytes.

Every app made here records the status of each response; a test that got a 5xx (the catch-all
handler for real bugs) fails at teardown, so no test can pass through a 500.
"""

import io
import struct
import time

import numpy as np
import pytest
import soundfile as sf

from webapp.server import create_app


def _make(config, instance, made):
    cfg = {"TESTING": True, "LOAD_DEMO": False, "INSTANCE_PATH": str(instance)}
    cfg.update(config)
    app = create_app(cfg)
    statuses = []
    app.config["_statuses"] = statuses

    @app.after_request
    def _record(response):
        statuses.append(response.status_code)
        return response

    made.append(app)
    return app


@pytest.fixture
def instance(tmp_path):
    path = tmp_path / "instance"
    path.mkdir()
    return path


@pytest.fixture
def make_app(instance):
    """``make_app(**config) -> app`` over the shared temporary instance (restarts reuse it)."""
    made = []

    def make(instance_path=None, **config):
        return _make(config, instance_path or instance, made)

    yield make
    for app in made:
        app.extensions["rateferry"].shutdown()
    for app in made:
        bad = [s for s in app.config["_statuses"] if s >= 500]
        assert not bad, f"a request hit a 5xx: {bad}"


@pytest.fixture
def app(make_app):
    return make_app()


@pytest.fixture
def client(app):
    return app.test_client()


@pytest.fixture
def headers(app):
    """The page's headers for state-changing requests."""
    return {"X-Rateferry-Token": app.config["PAGE_TOKEN"]}


@pytest.fixture
def tone():
    """``tone(rate_hz, seconds, freqs_hz=(1000,), amplitude=0.25, channels=1) -> frames x ch``:
    a sum of analytic sines (each of ``amplitude``)."""

    def make(rate_hz, seconds, freqs_hz=(1000.0,), amplitude=0.25, channels=1):
        t = np.arange(int(round(rate_hz * seconds))) / rate_hz
        x = sum(amplitude * np.sin(2 * np.pi * f * t) for f in freqs_hz)
        return np.repeat(x[:, None], channels, axis=1)

    return make


@pytest.fixture
def audio_bytes():
    """``audio_bytes(data, rate_hz, format="WAV", subtype="PCM_24") -> bytes`` via soundfile."""

    def make(data, rate_hz, format="WAV", subtype="PCM_24"):
        buf = io.BytesIO()
        sf.write(buf, data, rate_hz, format=format, subtype=subtype)
        return buf.getvalue()

    return make


@pytest.fixture
def wav_header():
    """``wav_header(rate_hz, channels, bits=16, data=b"") -> bytes``: a canonical RIFF/WAVE
    file built byte by byte (Microsoft RIFF WAVE layout, from memory), so fields soundfile
    refuses to write (0 channels, absurd rates) can be tested."""

    def make(rate_hz, channels, bits=16, data=b""):
        block = channels * bits // 8
        fmt = struct.pack("<HHIIHH", 1, channels, rate_hz, rate_hz * block, block, bits)
        body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" + \
            struct.pack("<I", len(data)) + data
        return b"RIFF" + struct.pack("<I", len(body)) + body

    return make


@pytest.fixture
def upload(client, headers):
    """``upload(data: bytes, filename) -> response`` through POST /api/recordings."""

    def post(data, filename):
        return client.post("/api/recordings", data={"file": (io.BytesIO(data), filename)},
                           headers=headers, content_type="multipart/form-data")

    return post


@pytest.fixture
def recording(upload, audio_bytes, tone):
    """``recording(data=None, rate_hz=44100, name="take.wav", **tone_kw) -> recording JSON``."""

    def make(data=None, rate_hz=44100, name="take.wav", subtype="PCM_24", **tone_kw):
        if data is None:
            data = tone(rate_hz, tone_kw.pop("seconds", 2.0), **tone_kw)
        r = upload(audio_bytes(data, rate_hz, subtype=subtype), name)
        assert r.status_code == 201, r.get_json()
        return r.get_json()

    return make


@pytest.fixture
def wait_done(client):
    """``wait_done(conversion_id, timeout_s=60) -> final conversion JSON`` by polling GET."""

    def wait(conversion_id, timeout_s=60.0):
        deadline = time.monotonic() + timeout_s
        while True:
            body = client.get(f"/api/conversions/{conversion_id}").get_json()
            if body["status"] in ("done", "failed", "cancelled"):
                return body
            assert time.monotonic() < deadline, f"conversion still {body['status']}"
            time.sleep(0.05)

    return wait


@pytest.fixture
def live_server(make_app):
    """``live_server(**config) -> (app, base_url)``: the app on waitress (webapp.server.wsgi,
    as `rateferry serve` runs it) on 127.0.0.1 at a free port, in a thread; stopped at the end."""
    import threading

    from webapp.server.wsgi import make_server
    servers = []

    def start(**config):
        app = make_app(**config)
        server = make_server(app, host="127.0.0.1", port=0, threads=config.get("THREADS", 16))
        app.config["SERVER_PORT"] = server.effective_port
        stop = threading.Event()

        def loop():   # waitress's run(), in short turns so it can be stopped cleanly
            while not stop.is_set():
                server.asyncore.loop(timeout=0.05, map=server._map, count=1)

        thread = threading.Thread(target=loop, name="live-waitress", daemon=True)
        thread.start()
        servers.append((server, thread, stop))
        return app, f"http://127.0.0.1:{server.effective_port}"

    yield start
    for server, thread, stop in servers:
        stop.set()
        thread.join(timeout=5)
        server.task_dispatcher.shutdown(timeout=5)
        server.close()
