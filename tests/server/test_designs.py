"""POST /api/designs, GET /api/designs/<id>[/plans], POST /api/audits.

References: scipy.signal.freqz is the reference for the plotted response; the group delay of a
symmetric FIR is (N - 1) / 2 samples (Oppenheim & Schafer, Discrete-Time Signal Processing,
1989, sec. 5.7); the mask edges follow the spec's documented rule (passband = fraction x lower
Nyquist, stopband = lower Nyquist).
"""

import numpy as np
import pytest
from scipy import signal

from webapp.dsp.design import design
from webapp.dsp.spec import preset, spec_from_dict
from webapp.dsp.stages import plan_options


def _post(client, headers, body):
    return client.post("/api/designs", json=body, headers=headers)


@pytest.fixture(scope="module")
def music_48k_to_16k():
    """The reference design of the core for the route the tests use."""
    return design(preset("music_delivery"), 48000, 16000)


def test_design_returns_figures_response_mask_impulse_and_verdict(client, headers,
                                                                  music_48k_to_16k):
    r = _post(client, headers, {"fs_in": 48000, "fs_out": 16000, "preset": "music_delivery"})
    assert r.status_code == 200
    body = r.get_json()
    d = music_48k_to_16k
    fig = body["figures"]
    assert (fig["up"], fig["down"], fig["numtaps"]) == (1, 3, d.numtaps)
    assert fig["measured"] == pytest.approx(d.measured.to_dict())
    assert body["verdict"]["meets_mask"] is True
    assert body["verdict"]["ripple_margin_db"] == pytest.approx(
        0.01 - d.measured.passband_ripple_db)
    assert body["verdict"]["attenuation_margin_db"] == pytest.approx(
        d.measured.stopband_attenuation_db - 120.0)
    assert body["verdict"]["text"].startswith("meets the mask")

    # the mask: passband 0.9 x 8000 Hz, stopband at the lower Nyquist 8000 Hz
    mask = body["mask"]
    assert (mask["passband_hz"], mask["stopband_hz"]) == (7200.0, 8000.0)
    assert (mask["fs_in_nyquist_hz"], mask["fs_out_nyquist_hz"]) == (24000.0, 8000.0)
    poly = {p["name"]: p for p in mask["polygons"]}
    assert max(poly["passband"]["x_hz"]) == 7200.0
    assert sorted(set(poly["passband"]["y_db"])) == [-0.01, 0.01]
    assert min(poly["stopband"]["x_hz"]) == 8000.0 and min(poly["stopband"]["y_db"]) == -120.0

    # the plotted response agrees with scipy.signal.freqz at its own frequencies
    resp = body["response"]
    f = np.asarray(resp["freqs_hz"])
    assert len(f) <= 2000 and f[-1] <= 48000
    _, h = signal.freqz(d.taps / d.phases, worN=f, fs=d.filter_rate_hz)
    ref = 20 * np.log10(np.maximum(np.abs(h), 1e-15))
    shown = np.asarray(resp["magnitude_db"])
    loud = ref > -200
    assert np.max(np.abs(shown[loud] - ref[loud])) < 1e-3
    # the stopband as plotted stays under the mask floor (the design meets it)
    assert np.all(shown[f >= 8000.0] <= -120.0 + 1e-6)

    # the passband close-up stays inside the ripple box up to the edge
    pb = body["passband"]
    fp, mp = np.asarray(pb["freqs_hz"]), np.asarray(pb["magnitude_db"])
    assert np.all(np.abs(mp[fp <= 7200.0]) <= 0.01)
    assert fp.max() > 7200.0  # it shows the start of the roll-off too


def test_impulse_and_group_delay_of_a_linear_phase_design(client, headers, music_48k_to_16k):
    body = _post(client, headers, {"fs_in": 48000, "fs_out": 16000,
                                   "preset": "music_delivery"}).get_json()
    d = music_48k_to_16k
    imp = body["impulse"]
    t, a = np.asarray(imp["time_ms"]), np.asarray(imp["amplitude"])
    k = int(np.argmax(np.abs(a)))
    assert t[k] == 0.0
    assert a[k] == pytest.approx(np.max(np.abs(d.taps)) / d.phases, rel=1e-6)
    assert imp["prering_ms"] == pytest.approx(d.prering_ms)
    assert imp["window_ms"][0] <= -imp["prering_ms"]  # the pre-ringing is inside the view
    # symmetric taps: group delay (N - 1) / 2 samples at the filter rate (O&S 1989, 5.7)
    gd = np.asarray(body["group_delay"]["delay_ms"])
    assert np.allclose(gd, (d.numtaps - 1) / 2 / d.filter_rate_hz * 1000)
    _, ref = signal.group_delay((d.taps, [1.0]), w=np.asarray(body["group_delay"]["freqs_hz"]),
                                fs=d.filter_rate_hz)
    assert np.allclose(gd, ref / d.filter_rate_hz * 1000, rtol=1e-6)


def test_minimum_phase_design_has_no_pre_ringing_and_a_measured_group_delay(client, headers):
    body = _post(client, headers, {"fs_in": 48000, "fs_out": 16000, "preset":
                                   "live_voice_pipeline", "plans": False}).get_json()
    d = design(preset("live_voice_pipeline"), 48000, 16000)
    assert body["figures"]["phase"] == "minimum"
    assert body["impulse"]["prering_ms"] == pytest.approx(d.prering_ms)
    # a minimum-phase filter puts its energy first (common practice): far less ringing before
    # its peak than the linear-phase filter of the same mask
    linear = design(spec_from_dict({"phase": "linear"}, base=preset("live_voice_pipeline")),
                    48000, 16000)
    assert body["impulse"]["prering_ms"] < 0.25 * linear.prering_ms
    f = np.asarray(body["group_delay"]["freqs_hz"])
    _, ref = signal.group_delay((d.taps, [1.0]), w=f[::40], fs=d.filter_rate_hz)
    gd = np.asarray(body["group_delay"]["delay_ms"])[::40]
    assert np.allclose(gd, ref / d.filter_rate_hz * 1000, atol=1e-3)


def test_plans_are_the_cores_plan_options(client, headers):
    body = _post(client, headers, {"fs_in": 48000, "fs_out": 8000,
                                   "preset": "spoken_word_delivery"}).get_json()
    single, plans = plan_options(preset("spoken_word_delivery"), 48000, 8000)
    got = body["plans"]
    assert [p["label"] for p in got["options"]] == [p.label for p in plans]
    assert [p["macs_per_output_sample"] for p in got["options"]] == pytest.approx(
        [p.macs_per_output_sample for p in plans])
    assert got["single"]["numtaps"] == single.numtaps
    assert got["chosen"] == "single"


def test_designs_are_cached_and_kept_by_id(client, headers):
    req = {"fs_in": 44100, "fs_out": 22050, "preset": "quick_preview", "plans": False}
    first = _post(client, headers, req).get_json()
    second = _post(client, headers, req).get_json()
    assert first["timing"]["cached"] is False and second["timing"]["cached"] is True
    assert first["id"] == second["id"]
    assert second["figures"] == first["figures"]
    again = client.get(f"/api/designs/{first['id']}?plans=false").get_json()
    assert again["figures"] == first["figures"]
    plans = client.get(f"/api/designs/{first['id']}/plans").get_json()
    assert plans["id"] == first["id"] and "options" in plans["plans"]
    other = _post(client, headers, dict(req, spec={"attenuation_db": 75})).get_json()
    assert other["id"] != first["id"]
    assert other["figures"]["mask"]["attenuation_db"] == 75.0


def test_spec_overrides_apply_on_top_of_the_preset(client, headers):
    body = _post(client, headers, {"fs_in": 48000, "fs_out": 16000, "preset": "quick_preview",
                                   "spec": {"passband_hz": 6000, "ripple_db": 0.05},
                                   "plans": False}).get_json()
    expected = spec_from_dict({"passband_hz": 6000, "ripple_db": 0.05},
                              base=preset("quick_preview"))
    assert body["spec"] == expected.to_dict()
    assert body["mask"]["passband_hz"] == 6000.0


def test_design_from_a_recording_takes_its_rate(client, headers, recording):
    rec = recording(rate_hz=32000, seconds=0.5)
    body = _post(client, headers, {"recording_id": rec["id"], "fs_out": 16000,
                                   "preset": "quick_preview", "plans": False}).get_json()
    assert body["fs_in"] == 32000


@pytest.mark.parametrize("body, field", [
    ({"fs_in": 48000, "fs_out": 5}, "fs_out"),
    ({"fs_in": "fast", "fs_out": 16000}, "fs_in"),
    ({"fs_in": 48000}, "fs_out"),
    ({"fs_in": 48000, "fs_out": 16000, "preset": "no_such_preset"}, "preset"),
    ({"fs_in": 48000, "fs_out": 16000, "spec": {"wobble": 1}}, "wobble"),
    ({"fs_in": 48000, "fs_out": 16000, "spec": {"attenuation_db": 500}}, "attenuation_db"),
    ({"fs_in": 48000, "fs_out": 16000, "spec": {"attenuation_db": "deep"}}, "attenuation_db"),
    ({"fs_in": 48000, "fs_out": 16000, "spec": {"stopband_hz": 5000}}, "stopband_hz"),
    ({"fs_in": 48000, "fs_out": 16000, "spec": {"passband_hz": 9000}}, "passband_hz"),
    ({"fs_in": 48000, "fs_out": 16000, "spec": {"phase": "sideways"}}, "phase"),
    ({"fs_in": 48000, "fs_out": 16000, "preset": "archival_master",
      "spec": {"arithmetic": "float32"}}, "arithmetic"),
    ({"fs_in": 44100, "fs_out": 48000, "spec": {"method": "equiripple"}}, "method"),
    ({"fs_in": 48000, "fs_out": 16000, "plans": "yes"}, "plans"),
    ({"design_id": "unknown-id"}, "design_id"),
    ({"recording_id": "unknown-id", "fs_out": 16000}, "recording_id"),
])
def test_bad_design_requests_name_the_field(client, headers, body, field):
    r = _post(client, headers, body)
    assert r.status_code in (400, 404)
    err = r.get_json()["error"]
    assert err["field"] == field, err
    assert err["message"]


def test_design_body_must_be_a_json_object(client, headers):
    for data in (b"[1, 2]", b"{not json"):
        r = client.post("/api/designs", data=data, headers=dict(headers, **{
            "Content-Type": "application/json"}))
        assert r.status_code == 400
        assert r.get_json()["error"]["field"] == "body"


def test_unknown_design_id_is_404(client):
    for url in ("/api/designs/nope", "/api/designs/nope/plans"):
        r = client.get(url)
        assert r.status_code == 404 and r.get_json()["error"]["field"] == "design_id"


def test_audit_endpoint_returns_the_cores_audit_figures(client, headers):
    from webapp.dsp import audit
    req = {"fs_in": 48000, "fs_out": 16000, "preset": "quick_preview"}
    r = client.post("/api/audits", json=req, headers=headers)
    assert r.status_code == 200
    body = r.get_json()
    expected = audit.audit(design(preset("quick_preview"), 48000, 16000)).figures()
    got = body["figures"]["verdict"]
    assert [(v["figure"], v["passes"]) for v in got] == \
        [(v["figure"], v["passes"]) for v in expected["verdict"]]
    assert [v["measured"] for v in got] == pytest.approx([v["measured"] for v in
                                                          expected["verdict"]])
    assert body["design_id"]
    again = client.post("/api/audits", json=req, headers=headers).get_json()
    assert again["timing"]["cached"] is True and again["figures"] == body["figures"]
    bad = client.post("/api/audits", json=dict(req, dither="loud"), headers=headers)
    assert bad.status_code == 400 and bad.get_json()["error"]["field"] == "dither"
