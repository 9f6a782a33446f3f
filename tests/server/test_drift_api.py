"""The time base endpoints: measure, listen before/after, the corrected conversion.

Outside references: the track is made by scipy.signal.resample_poly with 40001/40000 (+25 ppm,
the reference resampler) and 0.2 s of other content in front (physics: +200 ms); the corrected
output is measured again against the reference (the verification of the issue: the remaining
offset under 0.1 ms from start to end).
"""

import io

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from webapp import drift_files

FS = 16000


@pytest.fixture
def pair(recording, rng, speech_bursts):
    n = 50 * FS
    a = speech_bursts(rng, n + 2 * FS, FS)
    ref = 0.25 * a[:n] + 0.002 * rng.standard_normal(n)
    trk = 0.2 * signal.resample_poly(a, 40001, 40000)
    trk = trk + 0.003 * rng.standard_normal(trk.size)
    trk = np.concatenate([0.02 * rng.standard_normal(int(0.2 * FS)), trk])[:n]
    r = recording(ref[:, None], rate_hz=FS, name="call.wav")
    t = recording(trk[:, None], rate_hz=FS, name="guest.wav")
    return r, t


def test_drift_endpoint_measures_the_pair_with_points_for_the_plot(client, headers, pair):
    ref, trk = pair
    r = client.post("/api/drift", json=dict(reference_id=ref["id"], track_id=trk["id"]),
                    headers=headers)
    assert r.status_code == 200, r.get_json()
    body = r.get_json()
    # resample_poly 40001/40000: +25 ppm; 0.2 s in front: +200 ms
    assert body["drift_ppm"] == pytest.approx(25.0, abs=0.5)
    assert body["offset_ms"] == pytest.approx(200.0, abs=0.1)
    assert body["interval_ppm"] == [body["drift_ppm_low"], body["drift_ppm_high"]]
    pts = body["points"]
    assert len(pts["times_s"]) == len(pts["fitted_ms"]) == len(pts["residual_ms"]) \
        == body["windows_total"]
    assert (body["reference"], body["track"]) == ("call.wav", "guest.wav")
    again = client.post("/api/drift", json=dict(reference_id=ref["id"], track_id=trk["id"]),
                        headers=headers).get_json()
    assert again["cached"] is True and again["drift_ppm"] == body["drift_ppm"]


def test_drift_endpoint_refuses_a_missing_or_repeated_recording(client, headers, pair):
    ref, _ = pair
    r = client.post("/api/drift", json=dict(reference_id=ref["id"]), headers=headers)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "track_id"
    r = client.post("/api/drift", json=dict(reference_id=ref["id"], track_id="nope"),
                    headers=headers)
    assert r.status_code == 404 and r.get_json()["error"]["field"] == "track_id"
    r = client.post("/api/drift", json=dict(reference_id=ref["id"], track_id=ref["id"]),
                    headers=headers)
    assert r.status_code == 400 and "two different recordings" in r.get_json()["error"]["message"]


def test_listen_gives_the_pair_summed_before_and_after(client, headers, pair):
    ref, trk = pair
    r = client.post("/api/drift/listen", json=dict(reference_id=ref["id"], track_id=trk["id"],
                                                   start_s=20.0, length_s=5.0),
                    headers=headers)
    assert r.status_code == 201, r.get_json()
    body = r.get_json()
    before, rate = sf.read(io.BytesIO(client.get(body["before"]["url"]).data))
    after, _ = sf.read(io.BytesIO(client.get(body["after"]["url"]).data))
    assert rate == FS and before.size == after.size == 5 * FS
    # the louder sum peaks at the listening level (-6 dBFS)
    peak = max(np.abs(before).max(), np.abs(after).max())
    assert 20 * np.log10(peak) == pytest.approx(drift_files.LISTEN_PEAK_DBFS, abs=0.01)
    # physics: two equal-level copies of one signal add coherently (+6 dB) when aligned and as
    # power (+3 dB) when 200 ms apart; so the aligned sum is about 3 dB louder
    gain_db = 20 * np.log10(np.sqrt(np.mean(after ** 2)) / np.sqrt(np.mean(before ** 2)))
    assert 2.0 < gain_db < 3.5
    assert body["misalignment_before_ms"] == pytest.approx(200.5, abs=0.5)
    assert client.get(f"/api/drift/listen/{body['id']}/other").status_code == 404


def test_the_corrected_conversion_runs_like_any_other_and_lines_up(app, client, headers, pair,
                                                                   wait_done, tmp_path):
    ref, trk = pair
    r = client.post("/api/drift/conversions",
                    json=dict(reference_id=ref["id"], track_id=trk["id"], format="wav",
                              preset="spoken_word_delivery", delivery={"bits": "24"}),
                    headers=headers)
    assert r.status_code == 202, r.get_json()
    queued = r.get_json()
    assert queued["download_name"] == "guest_aligned_16k_24bit.wav"
    done = wait_done(queued["id"])
    assert done["status"] == "done", done["error"]
    f = done["figures"]
    assert f["time_base"]["fs_out"] == FS and f["frames_out"] == ref["frames"]
    assert f["path"] == "arbitrary"
    out = tmp_path / "corrected.wav"
    out.write_bytes(client.get(done["urls"]["download"]).data)
    store = app.extensions["rateferry"].store
    with store.open() as db:
        ref_path = db.get_recording(ref["id"])["path"]
    v = drift_files.verification(ref_path, str(out))
    assert v["worst_offset_ms"] < 0.1 and abs(v["drift_ppm"]) < 0.5
    # history lists it; its recipe carries the time base
    listed = client.get("/api/conversions").get_json()["conversions"]
    assert any(c["id"] == done["id"] for c in listed)
    recipe = client.get(done["urls"]["recipe"]).get_json()
    assert recipe["time_base"] == f["time_base"]


def test_a_corrected_conversions_recipe_reruns_bit_exact_on_the_page(client, headers, pair,
                                                                      wait_done):
    ref, trk = pair
    r = client.post("/api/drift/conversions",
                    json=dict(reference_id=ref["id"], track_id=trk["id"], format="flac",
                              preset="spoken_word_delivery"), headers=headers)
    done = wait_done(r.get_json()["id"])
    assert done["status"] == "done", done["error"]
    recipe = client.get(done["urls"]["recipe"]).get_json()
    r = client.post("/api/conversions", json=dict(recording_id=trk["id"], recipe=recipe),
                    headers=headers)
    assert r.status_code == 202, r.get_json()
    again = wait_done(r.get_json()["id"])
    assert again["status"] == "done", again["error"]
    # the same bytes (sha256) and every recorded figure, the time base included
    assert again["figures"]["recipe_check"] == {"reproduces": True, "differences": []}
    assert again["figures"]["output_sha256"] == done["figures"]["output_sha256"]
