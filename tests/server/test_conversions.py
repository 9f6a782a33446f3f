"""Background conversions: start, progress (poll and Server-Sent Events), cancel, results,
downloads, design sheets, recipes, blind trials.

References: physics (a sine sampled at the new rate is the analytic sine at that rate, within
the mask's passband ripple: |error| <= A (10^(ripple/20) - 1) plus the stopband floor); the
output length rule ceil(frames * up / down) of the converter (DEVELOPERS.md); soundfile reads every output back;
scipy.stats.binom is the reference for the blind-trial p-value.
"""

import hashlib
import io
import json
import math
import os
import time

import numpy as np
import pytest
import soundfile as sf
from scipy import stats
from werkzeug.http import parse_options_header

from webapp.dsp.spec import preset


def _start(client, headers, **body):
    return client.post("/api/conversions", json=body, headers=headers)


def _disposition(response):
    kind, params = parse_options_header(response.headers["Content-Disposition"])
    return kind, params.get("filename")


def _outputs(app):
    return sorted(os.listdir(app.extensions["rateferry"].store.outputs))


def _check_sine_output(data, rate_out, *, freq_hz, amplitude, ripple_db, attenuation_db,
                       rate_in, frames_in):
    up_down = rate_out / rate_in
    assert data.shape[0] == math.ceil(frames_in * up_down - 1e-9)
    assert np.all(np.isfinite(data))
    t = np.arange(data.shape[0]) / rate_out
    expected = amplitude * np.sin(2 * np.pi * freq_hz * t)
    edge = int(0.1 * rate_out)
    err = np.abs(data[edge:-edge, 0] - expected[edge:-edge])
    bound = amplitude * (10 ** (ripple_db / 20) - 1) + amplitude * 10 ** (-attenuation_db / 20)
    assert err.max() <= bound * 1.05 + 2e-7  # float32 output rounding: 2^-24 relative


def test_conversion_runs_in_the_background_and_delivers_the_file(app, client, headers,
                                                                 recording, wait_done):
    rec = recording(rate_hz=44100, seconds=2.0, name="Harbour take.wav")
    r = _start(client, headers, recording_id=rec["id"], fs_out=48000, format="flac",
               preset="music_delivery", delivery={"bits": "24"})
    assert r.status_code == 202
    queued = r.get_json()
    assert queued["status"] in ("queued", "running")
    assert queued["download_name"] == "Harbour take_48k_24bit.flac"
    done = wait_done(queued["id"])
    assert done["status"] == "done", done["error"]
    p = done["progress"]
    assert p["percent"] == 100.0 and p["frames_done"] == p["frames_total"] == 88200
    assert p["eta_s"] == 0.0
    f = done["figures"]
    assert f["frames_out"] == math.ceil(88200 * 160 / 147)
    assert (f["fs_out"], f["output_format"], f["output_subtype"]) == (48000, "FLAC", "PCM_24")
    assert f["meets_mask"] is True

    r = client.get(done["urls"]["download"])
    assert r.status_code == 200
    assert _disposition(r) == ("attachment", "Harbour take_48k_24bit.flac")
    data, rate = sf.read(io.BytesIO(r.data), always_2d=True)
    assert rate == 48000 and data.shape == (f["frames_out"], 1)
    assert hashlib.sha256(r.data).hexdigest() == f["output_sha256"]

    size = len(client.get(done["urls"]["download"]).data)
    r = client.get(done["urls"]["audio"], headers={"Range": "bytes=0-1023"})
    assert r.status_code == 206
    assert r.headers["Content-Range"] == f"bytes 0-1023/{size}"
    assert len(r.data) == 1024 and r.mimetype == "audio/flac"
    assert r.data == client.get(done["urls"]["download"]).data[:1024]


def test_four_concurrent_conversions_all_complete_correctly(client, headers, recording, tone,
                                                            wait_done):
    # four routes at once on two workers; float output, so the check is the filter alone
    routes = [(44100, 48000), (48000, 44100), (48000, 16000), (22050, 44100)]
    jobs = []
    for fs_in, fs_out in routes:
        x = tone(fs_in, 1.5, freqs_hz=(997.0,), amplitude=0.5, channels=2)
        rec = recording(data=x, rate_hz=fs_in, subtype="FLOAT", name=f"t{fs_in}.wav")
        r = _start(client, headers, recording_id=rec["id"], fs_out=fs_out, format="wav",
                   preset="music_delivery", delivery={"bits": "32f"})
        assert r.status_code == 202
        jobs.append((r.get_json()["id"], fs_in, fs_out, x.shape[0]))
    spec = preset("music_delivery")
    for cid, fs_in, fs_out, frames in jobs:
        done = wait_done(cid)
        assert done["status"] == "done", done["error"]
        data, rate = sf.read(io.BytesIO(client.get(done["urls"]["download"]).data),
                             always_2d=True)
        assert rate == fs_out and data.shape[1] == 2
        assert np.array_equal(data[:, 0], data[:, 1])
        _check_sine_output(data, fs_out, freq_hz=997.0, amplitude=0.5,
                           ripple_db=spec.ripple_db, attenuation_db=spec.attenuation_db,
                           rate_in=fs_in, frames_in=frames)


def test_progress_streams_as_server_sent_events(client, headers, recording):
    rec = recording(rate_hz=44100, seconds=3.0)
    cid = _start(client, headers, recording_id=rec["id"], fs_out=96000, format="wav",
                 preset="archival_master").get_json()["id"]
    r = client.get(f"/api/conversions/{cid}/events")
    assert r.status_code == 200 and r.mimetype == "text/event-stream"
    assert r.headers["Cache-Control"] == "no-cache"
    events = [e for e in r.get_data(as_text=True).split("\n\n") if e.strip()]
    assert events[-1].startswith("event: end\ndata: ")
    final = json.loads(events[-1].split("data: ", 1)[1])
    assert final["status"] == "done" and final["figures"]["fs_out"] == 96000
    percents = [json.loads(e.split("data: ", 1)[1])["progress"]["percent"]
                for e in events if e.startswith("data: ")]
    assert percents == sorted(percents)


def test_a_running_conversion_can_be_cancelled_and_leaves_nothing(app, client, headers,
                                                                  recording, tone, wait_done,
                                                                  rng):
    x = 0.1 * rng.standard_normal((44100 * 60, 2))
    rec = recording(data=x, rate_hz=44100, name="long.wav")
    cid = _start(client, headers, recording_id=rec["id"], fs_out=96000, format="wav",
                 preset="archival_master", delivery={"loudness_lufs": -20.0}).get_json()["id"]
    deadline = time.monotonic() + 60
    while True:
        body = client.get(f"/api/conversions/{cid}").get_json()
        if body["status"] == "running" and body["progress"]["frames_done"] > 0:
            break
        assert body["status"] in ("queued", "running") and time.monotonic() < deadline
        time.sleep(0.02)
    r = client.post(f"/api/conversions/{cid}/cancel", headers=headers)
    assert r.status_code == 200 and r.get_json()["cancel_requested"] is True
    done = wait_done(cid)
    assert done["status"] == "cancelled"
    assert done["progress"]["percent"] < 100
    assert _outputs(app) == []  # no output, no partial file
    r = client.post(f"/api/conversions/{cid}/cancel", headers=headers)
    assert r.status_code == 409
    assert client.get(f"/api/conversions/{cid}/download").status_code == 409


def test_a_queued_conversion_is_cancelled_at_once(make_app, audio_bytes, rng):
    app = make_app(WORKERS=1)
    c = app.test_client()
    h = {"X-Rateferry-Token": app.config["PAGE_TOKEN"]}
    data = audio_bytes(0.1 * rng.standard_normal((44100 * 30, 2)), 44100)
    rid = c.post("/api/recordings", data={"file": (io.BytesIO(data), "a.wav")}, headers=h,
                 content_type="multipart/form-data").get_json()["id"]
    body = dict(recording_id=rid, fs_out=96000, format="wav", preset="archival_master")
    first = c.post("/api/conversions", json=body, headers=h).get_json()["id"]
    second = c.post("/api/conversions", json=body, headers=h).get_json()["id"]
    r = c.post(f"/api/conversions/{second}/cancel", headers=h)
    assert r.get_json()["status"] == "cancelled"
    assert c.post(f"/api/conversions/{first}/cancel", headers=h).status_code == 200
    for cid in (first, second):
        for _ in range(1200):
            final = c.get(f"/api/conversions/{cid}").get_json()
            if final["status"] in ("done", "failed", "cancelled"):
                break
            time.sleep(0.05)
        assert final["status"] == "cancelled"
    assert c.get(f"/api/conversions/{second}").get_json()["started"] is None
    r = c.post("/api/renditions", json={"conversion_id": second, "rate_hz": 48000}, headers=h)
    assert r.status_code == 409 and r.get_json()["error"]["field"] == "conversion_id"


def test_history_lists_conversions_newest_first(client, headers, recording, wait_done):
    rec = recording(rate_hz=48000, seconds=0.5)
    ids = [_start(client, headers, recording_id=rec["id"], fs_out=fs, format="wav",
                  preset="quick_preview").get_json()["id"] for fs in (16000, 24000)]
    for cid in ids:
        wait_done(cid)
    listed = client.get("/api/conversions").get_json()["conversions"]
    assert [c["id"] for c in listed] == ids[::-1]
    assert all("figures" not in c for c in listed)
    only = client.get(f"/api/conversions?recording_id={rec['id']}").get_json()["conversions"]
    assert len(only) == 2


@pytest.mark.parametrize("extra, status, field", [
    ({"recording_id": "missing"}, 404, "recording_id"),
    ({"format": "mp4"}, 400, "format"),
    ({"delivery": {"bits": "32f"}}, 400, "bits"),            # FLAC has no float
    ({"delivery": {"bits": "12"}}, 400, "bits"),
    ({"delivery": {"colour": "warm"}}, 400, "colour"),
    ({"delivery": {"ceiling_dbtp": 5.0}}, 400, "ceiling_dbtp"),
    ({"delivery": {"ceiling_dbtp": "high"}}, 400, "ceiling_dbtp"),
    ({"delivery": {"dither": "loud"}}, 400, "dither"),
    ({"delivery": {"dither_seed": -1}}, 400, "dither_seed"),
    ({"delivery": "24 bit"}, 400, "delivery"),
    ({"fs_out": 44100, "format": "opus", "delivery": {}}, 400, "rate_hz"),
    ({"spec": {"stopband_hz": 100.0}}, 400, "stopband_hz"),
    ({"fs_out": 2_000_000}, 400, "fs_out"),
])
def test_bad_conversion_requests_are_refused_before_any_work(app, client, headers, recording,
                                                             extra, status, field):
    rec = recording(rate_hz=48000, seconds=0.5)
    body = dict(dict(recording_id=rec["id"], fs_out=16000, format="flac",
                     preset="quick_preview"), **extra)
    r = _start(client, headers, **body)
    assert r.status_code == status, r.get_json()
    assert r.get_json()["error"]["field"] == field
    assert client.get("/api/conversions").get_json()["conversions"] == []
    assert _outputs(app) == []


def test_unknown_conversion_is_404_everywhere(client, headers):
    for url in ("/api/conversions/zz", "/api/conversions/zz/events",
                "/api/conversions/zz/download", "/api/conversions/zz/audio",
                "/api/conversions/zz/sheet", "/api/conversions/zz/recipe",
                "/api/conversions/zz/blind_trials"):
        r = client.get(url)
        assert r.status_code == 404, url
        assert r.get_json()["error"]["field"] == "conversion_id"
    r = client.post("/api/conversions/zz/cancel", headers=headers)
    assert r.status_code == 404


# ---------------------------------------------------------------------------------------------
# after a conversion: blind trials, recipe, design sheet

@pytest.fixture
def finished(client, headers, recording, wait_done):
    rec = recording(rate_hz=48000, seconds=1.0, name="ident.wav")
    cid = _start(client, headers, recording_id=rec["id"], fs_out=44100, format="flac",
                 preset="quick_preview", delivery={"bits": "16"}).get_json()["id"]
    done = wait_done(cid)
    assert done["status"] == "done", done["error"]
    return done


@pytest.mark.parametrize("trials, correct", [(16, 12), (10, 5), (1, 1), (20, 0)])
def test_blind_trials_are_kept_with_the_binomial_p_value(client, headers, finished, trials,
                                                         correct):
    url = finished["urls"]["blind_trials"]
    r = client.post(url, json={"trials": trials, "correct": correct}, headers=headers)
    assert r.status_code == 201
    # scipy.stats.binom: P(X >= correct) for X ~ Binomial(trials, 1/2)
    assert r.get_json()["p_value"] == pytest.approx(stats.binom.sf(correct - 1, trials, 0.5),
                                                    rel=1e-12)
    listed = client.get(url).get_json()
    assert listed["summary"]["trials"] == trials and listed["summary"]["correct"] == correct


def test_blind_trial_answers_must_agree_with_the_count(client, headers, finished):
    url = finished["urls"]["blind_trials"]
    answers = [{"x": "A", "answer": "A"}, {"x": "B", "answer": "A"}, {"x": "B", "answer": "B"}]
    ok = client.post(url, json={"trials": 3, "correct": 2, "answers": answers}, headers=headers)
    assert ok.status_code == 201 and ok.get_json()["answers"] == answers
    for body, field in (({"trials": 3, "correct": 3, "answers": answers}, "correct"),
                        ({"trials": 0, "correct": 0}, "trials"),
                        ({"trials": 4, "correct": 5}, "correct"),
                        ({"trials": 2, "correct": 1, "answers": [{"x": "C"}]}, "answers"),
                        ({"correct": 1}, "trials")):
        r = client.post(url, json=body, headers=headers)
        assert r.status_code == 400 and r.get_json()["error"]["field"] == field, body


def test_recipe_download_reproduces_and_uploads_back(client, headers, finished):
    from webapp import recipe as recipe_module
    r = client.get(finished["urls"]["recipe"])
    assert r.status_code == 200
    assert _disposition(r) == ("attachment", "ident_44k1_16bit.recipe.json")
    recipe = recipe_module.load_recipe(r.data)
    assert recipe.fs_out == 44100 and recipe.spec == preset("quick_preview")
    assert recipe.output_sha256 == finished["figures"]["output_sha256"]
    # the names the user knows, not the generated storage names
    assert recipe.source_name == "ident.wav"
    assert recipe.data["output"]["name"] == "ident_44k1_16bit.flac"
    up = client.post("/api/recipes", data={"file": (io.BytesIO(r.data), "r.json")},
                     headers=headers, content_type="multipart/form-data")
    assert up.status_code == 200
    body = up.get_json()
    assert body["fs_out"] == 44100 and body["spec"] == preset("quick_preview").to_dict()
    assert body["delivery"]["bits"] == "16"
    bad = client.post("/api/recipes", data={"file": (io.BytesIO(b"{\"x\": 1}"), "r.json")},
                      headers=headers, content_type="multipart/form-data")
    assert bad.status_code == 400 and bad.get_json()["error"]["message"]


def test_design_sheet_download_includes_the_blind_trials(client, headers, finished):
    client.post(finished["urls"]["blind_trials"], json={"trials": 8, "correct": 7},
                headers=headers)
    r = client.get(finished["urls"]["sheet"] + "?title=Ident%20check&author=Sam")
    assert r.status_code == 200 and r.mimetype == "text/html"
    assert _disposition(r) == ("attachment", "ident_44k1_16bit_sheet.html")
    html = r.get_data(as_text=True)
    assert "Ident check" in html and "Sam" in html
    assert "Blind listening trials" in html
    assert finished["figures"]["output_sha256"] in html
    assert "ident.wav" in html


@pytest.mark.parametrize("correct, trials", [(12, 16), (5100, 10000), (0, 3000)])
def test_blind_trial_p_values_hold_for_thousands_of_trials(correct, trials):
    from webapp.listening import binomial_tail
    # reference: scipy.stats.binomtest, one-sided (at least `correct` right by guessing)
    expected = stats.binomtest(correct, trials, 0.5, alternative="greater").pvalue
    assert binomial_tail(correct, trials) == pytest.approx(expected, rel=1e-9)
