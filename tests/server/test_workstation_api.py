"""Endpoints the page's daily flow needs: the design estimate before an extreme design, the
overview of a whole recording, the options the page reads instead of keeping its own copies,
and every demo recording listed.

References: Kaiser's length estimate numtaps = ceil((A - 7.95) / (2.285 pi dw) + 1) (Kaiser 1974,
the constant as in scipy.signal.kaiserord, our reference library); a linear-phase FIR of N taps
delays by (N - 1) / 2 samples (Oppenheim & Schafer 1989, sec. 5.7); a sine of amplitude A reads
a short-term loudness of 20 log10(A) - 3.01 LUFS in one channel at 997 Hz (ITU-R BS.1770-4,
sec. 2.1; 1 kHz is within 0.01 dB of it through the K-weighting, from memory).
"""

import math

import numpy as np
import pytest
from scipy import signal

from webapp.designs import EXTREME_NUMTAPS
from webapp.dsp.spec import DEFAULT_PRESET
from webapp.figures import PALETTE


def test_options_serve_the_defaults_the_page_uses(client):
    body = client.get("/api/options").get_json()
    assert body["default_preset"] == DEFAULT_PRESET == "spoken_word_delivery"
    assert body["presets"]["spoken_word_delivery"]["bits"] == "16"
    assert body["presets"]["music_delivery"]["bits"] is None
    assert body["palette"] == PALETTE
    assert body["default_delivery"]["dither"] in body["dithers"]
    assert body["blind_trial_default"] in body["blind_trial_counts"]
    assert body["default_targets_hz"][0] in body["common_rates_hz"]


def test_estimate_before_a_design_flags_the_extreme_one(client, headers):
    # 44.1 -> 48 kHz with a passband edge of 21 990 Hz: a 60 Hz transition at 7.056 MHz
    body = {"fs_in": 44100, "fs_out": 48000, "preset": "music_delivery",
            "spec": {"passband_hz": 21990}}
    r = client.post("/api/estimates", json=body, headers=headers)
    assert r.status_code == 200
    est = r.get_json()
    rate = 44100 * 160
    width = (22050 - 21990) / (rate / 2)
    a = 120.0                          # the stopband (120 dB) is tighter than the 0.01 dB ripple
    expected = math.ceil((a - 7.95) / (2.285 * math.pi * width) + 1)
    assert est["numtaps"] in (expected, expected + 1)        # made odd
    assert est["latency_ms"] == pytest.approx((est["numtaps"] - 1) / 2 / rate * 1000)
    assert est["extreme"] is True and est["numtaps"] > EXTREME_NUMTAPS
    assert "taps" in est["reasons"][0]
    # scipy's own estimate agrees (kaiserord gives the same length formula)
    n_scipy, _ = signal.kaiserord(a, width)
    assert abs(est["numtaps"] - n_scipy) <= 2
    # an ordinary route is not extreme
    ok = client.post("/api/estimates", json={"fs_in": 44100, "fs_out": 48000},
                     headers=headers).get_json()
    assert ok["extreme"] is False and ok["numtaps"] < EXTREME_NUMTAPS
    # bad input is a 400 naming the field
    bad = client.post("/api/estimates", json={"fs_in": 44100, "fs_out": 48000,
                                                     "spec": {"passband_hz": 30000}},
                      headers=headers)
    assert bad.status_code == 400 and bad.get_json()["error"]["field"] == "passband_hz"


def test_overview_draws_the_whole_recording_with_full_scale_and_overs(client, recording):
    rate = 48000
    t = np.arange(10 * rate) / rate
    x = 0.25 * np.sin(2 * np.pi * 1000 * t)
    # 2.0 to 2.1 s: samples pinned at full scale (a clipped stretch: 4800 frames)
    x[2 * rate:int(2.1 * rate)] = 1.0
    # 6.0 to 6.05 s: a sine at fs/4, phase 45 degrees, amplitude 1.2: its samples are
    # 1.2 / sqrt(2) = 0.85 but the reconstructed wave peaks at 1.2 (+1.6 dBTP)
    k = np.arange(int(0.05 * rate))
    x[6 * rate:6 * rate + k.size] = 1.2 * np.sin(np.pi / 2 * k + np.pi / 4)
    rec = recording(data=x[:, None], rate_hz=rate, name="overs.wav", subtype="FLOAT")
    r = client.get(f"/api/recordings/{rec['id']}/overview?columns=500")
    assert r.status_code == 200
    ov = r.get_json()
    assert ov["columns"] == 500 and len(ov["min"]) == len(ov["max"]) == 500
    assert max(ov["max"]) == pytest.approx(1.0)
    assert min(ov["min"]) == pytest.approx(-1.2 / math.sqrt(2), abs=1e-4)
    # the quiet stretch: the envelope of the 0.25 sine
    assert ov["max"][50] == pytest.approx(0.25, abs=1e-3)
    assert ov["min"][50] == pytest.approx(-0.25, abs=1e-3)
    fs = ov["full_scale"]
    assert fs["total"] == int(0.1 * rate)
    assert all(2.0 <= s < 2.1 for s in fs["time_s"])
    overs = ov["overs"]
    # the fs/4 burst goes over; so do the steps into and out of the clipped stretch (a step
    # overshoots once band-limited, which is what a true-peak meter reports); nothing else
    assert any(6.0 <= s <= 6.06 for s in overs["time_s"])
    assert all(6.0 <= s <= 6.06 or 2.0 <= s <= 2.11 for s in overs["time_s"])
    # short-term loudness of the 0.25 sine alone (the window 0 to 3 s holds the clipped part,
    # the one ending at 10 s starts at 7 s): 20 log10(0.25) - 3.01 = -15.05 LUFS
    assert ov["short_term_lufs"][-1] == pytest.approx(20 * math.log10(0.25) - 3.01, abs=0.05)
    assert ov["short_term_lufs"][0] is None                      # before the first 3 s
    # the same request again comes from the cache
    assert client.get(f"/api/recordings/{rec['id']}/overview?columns=500").get_json()["cached"]
    bad = client.get(f"/api/recordings/{rec['id']}/overview?columns=lots")
    assert bad.status_code == 400 and bad.get_json()["error"]["field"] == "columns"


def test_every_demo_recording_is_listed(make_app):
    from webapp.server import SOURCE_ROOT
    import os
    folder = os.path.join(SOURCE_ROOT, "demo_media")
    names = sorted(n for n in os.listdir(folder) if n.endswith((".flac", ".wav")))
    app = make_app(LOAD_DEMO=True, DEMO_MEDIA=folder)
    listed = app.test_client().get("/api/recordings").get_json()["recordings"]
    assert sorted(r["name"] for r in listed if r["demo"]) == names
    main = app.extensions["rateferry"].demo_id
    assert [r["name"] for r in listed if r["id"] == main] == ["harbour_interview_44k1.flac"]
