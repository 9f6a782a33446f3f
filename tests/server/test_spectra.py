"""POST /api/spectra: source and target spectra, Nyquist limits, mask, energy above Nyquist.

References: physics of sampled sines (a tone above the target Nyquist f_n aliases to
fs_out - f unless it is filtered; equal-amplitude tones carry equal power, so one of two holds
half the energy, -3.01 dB); scipy.signal.welch is the reference PSD estimator.
"""

import numpy as np
import pytest
from scipy import signal


def _post(client, headers, body):
    return client.post("/api/spectra", json=body, headers=headers)


def _level_near(freqs, psd, f0, width=30.0):
    freqs, psd = np.asarray(freqs), np.asarray(psd)
    sel = np.abs(freqs - f0) <= width
    return float(psd[sel].max())


def test_spectra_show_the_tone_above_the_target_nyquist_and_its_removal(client, headers,
                                                                        recording, tone):
    # 1 kHz in band, 12.5 kHz above the 8 kHz target Nyquist (it would alias to 3.5 kHz)
    x = tone(44100, 4.0, freqs_hz=(1000.0, 12500.0), amplitude=0.2)
    rec = recording(data=x, rate_hz=44100, subtype="FLOAT")
    r = _post(client, headers, {"recording_id": rec["id"], "fs_out": 16000,
                                "preset": "music_delivery"})
    assert r.status_code == 200
    body = r.get_json()
    src, tgt = body["source"], body["target"]
    assert (src["rate_hz"], src["nyquist_hz"]) == (44100, 22050.0)
    assert (tgt["rate_hz"], tgt["nyquist_hz"]) == (16000, 8000.0)
    assert max(src["freqs_hz"]) <= 22050.0 and max(tgt["freqs_hz"]) <= 8000.0
    assert body["analysis"]["mode"] == "whole"
    assert body["analysis"]["seconds_analysed"] == pytest.approx(4.0)

    # the source spectrum: both tones at the same level, as scipy.signal.welch sees them
    assert _level_near(src["freqs_hz"], src["psd_db"], 1000) == pytest.approx(
        _level_near(src["freqs_hz"], src["psd_db"], 12500), abs=0.5)
    f_ref, p_ref = signal.welch(x[:, 0].astype(np.float32).astype(np.float64), fs=44100,
                                window="hann", nperseg=8192)
    assert _level_near(src["freqs_hz"], src["psd_db"], 1000) == pytest.approx(
        10 * np.log10(_level_near(f_ref, p_ref, 1000)), abs=0.05)

    # the target: the 1 kHz tone survives, no alias at 16000 - 12500 = 3500 Hz
    tone_db = _level_near(tgt["freqs_hz"], tgt["psd_db"], 1000)
    assert tone_db == pytest.approx(_level_near(src["freqs_hz"], src["psd_db"], 1000), abs=0.5)
    assert _level_near(tgt["freqs_hz"], tgt["psd_db"], 3500) < tone_db - 115

    # energy above the target Nyquist: half of it (-3.01 dB) without the filter
    above = body["above_target_nyquist"]
    assert above["applies"] is True
    assert (above["from_hz"], above["to_hz"]) == (8000.0, 22050.0)
    assert above["source_db"] == pytest.approx(-3.01, abs=0.1)
    assert above["after_filter_db"] < -3.01 - 120 + 1
    assert body["mask"]["stopband_hz"] == 8000.0 and body["mask"]["attenuation_db"] == 120.0
    assert body["meets_mask"] is True and body["design_id"]


def test_upsampling_has_nothing_above_the_target_nyquist(client, headers, recording):
    rec = recording(rate_hz=22050, seconds=1.0)
    body = _post(client, headers, {"recording_id": rec["id"], "fs_out": 44100,
                                   "preset": "quick_preview", "log_axis": True}).get_json()
    above = body["above_target_nyquist"]
    assert above["applies"] is False and above["source_db"] is None
    assert body["target"]["nyquist_hz"] == 22050.0
    assert body["mask"]["fs_in_nyquist_hz"] == 11025.0


def test_long_files_are_analysed_from_spread_excerpts(client, headers, recording):
    rec = recording(rate_hz=8000, seconds=40.0)
    body = _post(client, headers, {"recording_id": rec["id"], "fs_out": 16000,
                                   "preset": "quick_preview"}).get_json()
    a = body["analysis"]
    assert a["mode"] == "excerpts"
    starts = [s for s, _ in a["excerpts"]]
    assert starts[0] == 0.0 and starts[-1] + a["excerpts"][-1][1] == pytest.approx(40.0)
    assert a["seconds_analysed"] < 40.0


def test_one_chosen_excerpt(client, headers, recording):
    rec = recording(rate_hz=8000, seconds=10.0)
    body = _post(client, headers, {"recording_id": rec["id"], "fs_out": 16000,
                                   "preset": "quick_preview", "start_s": 8.0,
                                   "length_s": 5.0}).get_json()
    assert body["analysis"]["mode"] == "excerpt"
    assert body["analysis"]["excerpts"] == [[8.0, 2.0]]  # cut short at the end of the file


@pytest.mark.parametrize("extra, status, field", [
    ({"length_s": 61.0}, 400, "length_s"),
    ({"length_s": 0.0}, 400, "length_s"),
    ({"start_s": 99.0}, 400, "start_s"),
    ({"start_s": -1.0}, 400, "start_s"),
    ({"fs_out": 3}, 400, "fs_out"),
    ({"recording_id": "nope"}, 404, "recording_id"),
    ({"log_axis": "maybe"}, 400, "log_axis"),
])
def test_bad_spectra_requests(client, headers, recording, extra, status, field):
    rec = recording(rate_hz=8000, seconds=2.0)
    body = dict({"recording_id": rec["id"], "fs_out": 16000, "preset": "quick_preview"},
                **extra)
    r = _post(client, headers, body)
    assert r.status_code == status
    assert r.get_json()["error"]["field"] == field
