"""An upload's `spectra` field: the page's route, whose spectra run beside the upload's analysis
and answer the page's POST /api/spectra (kept, or waited for) instead of being computed again.

References: the spectra the endpoint computes itself for the same recording and route (an
upload without the field; their own checks against scipy.signal.welch and the physics of
sampled sines are in test_spectra.py); the physics of a sampled sine: a 1 kHz tone peaks at
1 kHz in both spectra. The order estimate that makes a design extreme is the Kaiser formula
checked in test_workstation_api.py.
"""

from concurrent.futures import Future
import io
import json
import os
import threading

import numpy as np
import pytest

from webapp.designs import DesignCache

ROUTE = {"fs_out": 16000, "preset": "music_delivery", "spec": {}, "log_axis": False}


def _post(client, headers, data, name="take.wav", **fields):
    return client.post("/api/recordings", headers=headers, content_type="multipart/form-data",
                       data=dict(fields, file=(io.BytesIO(data), name)))


def _spectra(client, headers, rec, route=ROUTE):
    return client.post("/api/spectra", headers=headers, json=dict(route, recording_id=rec["id"]))


def _figures(body):
    return {k: v for k, v in body.items() if k not in ("cached", "recording_id")}


def _peak_hz(curve):
    return curve["freqs_hz"][int(np.argmax(curve["psd_db"]))]


def test_spectra_of_the_upload_route_are_ready_when_the_page_asks(app, client, headers,
                                                                 audio_bytes, tone):
    x = tone(44100, 3.0, freqs_hz=(1000.0,), amplitude=0.25, channels=2)
    data = audio_bytes(x, 44100)
    rec = _post(client, headers, data, spectra=json.dumps(ROUTE)).get_json()
    got = _spectra(client, headers, rec)
    assert got.status_code == 200
    ahead = got.get_json()
    assert ahead["cached"] is True and ahead["recording_id"] == rec["id"]
    # the same figures as the endpoint computes itself for an upload without the field
    plain_rec = _post(client, headers, data, "again.wav").get_json()
    plain = _spectra(client, headers, plain_rec).get_json()
    assert plain["cached"] is False
    assert _figures(ahead) == _figures(plain)
    assert _peak_hz(ahead["source"]) == pytest.approx(1000.0, abs=6.0)    # a bin is 5.4 Hz
    assert _peak_hz(ahead["target"]) == pytest.approx(1000.0, abs=6.0)
    # another route of the same recording is computed on request, as before
    log = _spectra(client, headers, rec, dict(ROUTE, log_axis=True)).get_json()
    assert log["cached"] is False and log["source"]["rate_hz"] == 44100


@pytest.mark.parametrize("raw, word", [("{not json", "not valid JSON"),
                                       ("[48000]", "must be a JSON object")])
def test_a_spectra_field_that_is_not_a_json_object_refuses_the_upload(app, client, headers,
                                                                     audio_bytes, tone, raw,
                                                                     word):
    r = _post(client, headers, audio_bytes(tone(44100, 0.5), 44100), spectra=raw)
    assert r.status_code == 400
    err = r.get_json()["error"]
    assert err["field"] == "spectra" and word in err["message"]
    assert os.listdir(app.extensions["rateferry"].store.uploads) == []


def test_a_route_the_spectra_refuse_is_left_for_the_spectra_request_to_report(app, client,
                                                                             headers,
                                                                             audio_bytes, tone):
    route = dict(ROUTE, start_s=10.0, length_s=1.0)      # past the end of a 1 s file
    rec = _post(client, headers, audio_bytes(tone(44100, 1.0), 44100),
                spectra=json.dumps(route))
    assert rec.status_code == 201
    r = _spectra(client, headers, rec.get_json(), route)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "start_s"


def test_nothing_starts_ahead_for_an_extreme_design_or_the_recording_own_rate(app, audio_bytes,
                                                                             tone, tmp_path):
    from webapp import media
    from webapp.server import spectra_ahead
    path = tmp_path / "take.wav"
    path.write_bytes(audio_bytes(tone(44100, 0.5), 44100))
    info = media.probe(str(path))
    st = app.extensions["rateferry"]
    with app.test_request_context():
        # a 60 Hz transition at 44.1 -> 48 kHz: more than 100 000 taps (the page asks first)
        extreme = dict(ROUTE, fs_out=48000, spec={"passband_hz": 21990})
        assert spectra_ahead.start(st.ahead, st.cache, extreme, str(path), info) is None
        same = dict(ROUTE, fs_out=44100)
        assert spectra_ahead.start(st.ahead, st.cache, same, str(path), info) is None
        ask, future = spectra_ahead.start(st.ahead, st.cache, ROUTE, str(path), info)
    assert (ask.fs_in, ask.fs_out) == (44100, 16000)
    view = future.result(timeout=60)
    assert view["target"]["nyquist_hz"] == 8000.0


def test_a_memo_waits_for_an_adopted_computation_and_computes_when_it_fails():
    cache = DesignCache()
    try:
        running = Future()
        cache.adopt("spectra", ("rec",), running)
        calls = []
        answers = []
        asking = threading.Thread(target=lambda: answers.append(
            cache.memo("spectra", ("rec",), lambda: calls.append(1) or "computed again")))
        asking.start()
        asking.join(timeout=0.3)
        assert asking.is_alive() and not answers      # waiting for the adopted work
        running.set_result("ahead")
        asking.join(timeout=10)
        assert answers == [("ahead", True)] and calls == []
        assert cache.memo("spectra", ("rec",), lambda: "again") == ("ahead", True)   # kept

        failed = Future()
        cache.adopt("spectra", ("other",), failed)
        failed.set_exception(RuntimeError("the file went away"))
        assert cache.memo("spectra", ("other",), lambda: "computed") == ("computed", False)
    finally:
        cache.shutdown()
