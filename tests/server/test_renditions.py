"""POST /api/renditions: time-aligned, level-matched excerpts at the playback rate, and the
difference.

References: pyloudnorm (a general-purpose BS.1770 implementation outside the project) checks the
level match; physics checks the alignment (two renditions of one sine at one rate agree sample
by sample when aligned, and the cross-correlation of a broadband signal peaks at lag 0);
soundfile reads every WAV back.
"""

import io

import numpy as np
import pyloudnorm
import pytest
import soundfile as sf


def _render(client, headers, **body):
    return client.post("/api/renditions", json=body, headers=headers)


def _wav(client, url):
    r = client.get(url)
    assert r.status_code == 200 and r.mimetype == "audio/wav"
    return sf.read(io.BytesIO(r.data), always_2d=True)


@pytest.fixture
def converted(client, headers, recording, tone, wait_done):
    """A 44.1 kHz two-tone recording converted to 48 kHz (float WAV)."""
    x = tone(44100, 4.0, freqs_hz=(440.0, 3000.0), amplitude=0.2, channels=2)
    rec = recording(data=x, rate_hz=44100, subtype="FLOAT")
    cid = client.post("/api/conversions", json=dict(
        recording_id=rec["id"], fs_out=48000, format="wav", preset="music_delivery",
        delivery={"bits": "32f", "loudness_lufs": -30.0}), headers=headers).get_json()["id"]
    done = wait_done(cid)
    assert done["status"] == "done", done["error"]
    return rec, done


def test_renditions_are_aligned_level_matched_and_at_the_playback_rate(client, headers,
                                                                       converted):
    rec, conv = converted
    r = _render(client, headers, conversion_id=conv["id"], start_s=1.0, length_s=3.0,
                rate_hz=48000)
    assert r.status_code == 201
    body = r.get_json()
    assert body["rate_hz"] == 48000 and body["frames"] == 144000
    assert body["start_s"] == 1.0 and body["length_s"] == 3.0
    assert body["original"]["resampled_for_playback"] is True
    assert body["converted"]["resampled_for_playback"] is False
    assert body["converted"]["from_output_file"] is True
    assert body["alignment"]["shift_samples"] == 0

    orig, ro = _wav(client, body["original"]["url"])
    conv_, rc = _wav(client, body["converted"]["url"])
    diff, rd = _wav(client, body["difference"]["url"])
    assert ro == rc == rd == 48000
    assert orig.shape == conv_.shape == diff.shape == (144000, 2)

    # the conversion applied a -30 LUFS target; the renditions undo it: same loudness
    meter = pyloudnorm.Meter(48000)
    lo, lc = meter.integrated_loudness(orig), meter.integrated_loudness(conv_)
    assert lo == pytest.approx(lc, abs=0.02)
    assert body["level_match"]["method"] == "integrated_loudness"
    assert body["original"]["gain_db"] == 0.0 or body["converted"]["gain_db"] == 0.0
    assert body["converted"]["gain_db"] - body["original"]["gain_db"] == pytest.approx(
        body["original"]["integrated_lufs"] - body["converted"]["integrated_lufs"])

    # both are the same sines at the same time: the difference is tiny, and it is exactly
    # converted - original
    assert np.allclose(diff, conv_ - orig, atol=1e-7)
    rms = lambda v: 10 * np.log10(np.mean(v ** 2))
    assert rms(diff) - rms(orig) < -90
    assert body["difference"]["level_db"] == pytest.approx(rms(diff) - rms(orig), abs=0.1)
    assert body["difference"]["caution"] is True
    assert "Hearing caution" in body["difference"]["caution_text"]
    assert body["difference"]["max_boost_db"] == pytest.approx(
        -20 * np.log10(np.max(np.abs(diff))), abs=0.01)


def test_renditions_at_another_device_rate_use_our_converter(client, headers, converted):
    _, conv = converted
    body = _render(client, headers, conversion_id=conv["id"], start_s=0.5, length_s=2.0,
                   rate_hz=96000, sample_format="pcm24").get_json()
    assert body["original"]["resampled_for_playback"] is True
    assert body["converted"]["resampled_for_playback"] is True
    assert body["playback_preset"] == "archival_master"
    r = client.get(body["original"]["url"])
    info = sf.info(io.BytesIO(r.data))
    assert (info.samplerate, info.frames, info.subtype) == (96000, 192000, "PCM_24")


def test_rendition_before_converting_uses_the_same_design_and_aligns(client, headers,
                                                                     recording, rng):
    # broadband noise: aligned renditions correlate best at lag 0
    x = 0.1 * rng.standard_normal((48000 * 3, 1))
    rec = recording(data=x, rate_hz=48000, subtype="FLOAT")
    for preset_name in ("music_delivery", "live_voice_pipeline"):
        body = _render(client, headers, recording_id=rec["id"], fs_out=16000,
                       preset=preset_name, start_s=0.5, length_s=2.0, rate_hz=48000).get_json()
        assert body["converted"]["from_output_file"] is False
        orig, _ = _wav(client, body["original"]["url"])
        conv, _ = _wav(client, body["converted"]["url"])
        n = orig.shape[0]
        lags = np.arange(-20, 21)
        xc = [np.dot(orig[max(0, -k):n - max(0, k), 0], conv[max(0, k):n - max(0, -k), 0])
              for k in lags]
        assert lags[int(np.argmax(xc))] == 0, preset_name
        if preset_name == "live_voice_pipeline":
            assert body["alignment"]["phase"] == "minimum"
            assert body["alignment"]["shift_samples"] == round(
                body["alignment"]["latency_ms"] / 1000 * 48000)
        # what the conversion removed above 8 kHz is what the difference holds: about a third
        # of white noise's power (8 of 24 kHz) lies there, so the difference is loud
        assert body["difference"]["level_db"] > -10


def test_renditions_support_range_requests(client, headers, converted):
    _, conv = converted
    body = _render(client, headers, conversion_id=conv["id"], start_s=0.0, length_s=1.0,
                   rate_hz=48000).get_json()
    r = client.get(body["converted"]["url"], headers={"Range": "bytes=44-143"})
    assert r.status_code == 206
    assert r.headers["Content-Range"].startswith("bytes 44-143/")
    assert len(r.data) == 100


BAD_REQUESTS = [
    ({"length_s": 61.0}, 400, "length_s"),
    ({"length_s": 0.1}, 400, "length_s"),
    ({"start_s": 50.0}, 400, "start_s"),
    ({"start_s": -2.0}, 400, "start_s"),
    ({"rate_hz": 5}, 400, "rate_hz"),
    ({"rate_hz": None}, 400, "rate_hz"),
    ({"sample_format": "mp3"}, 400, "sample_format"),
    ({"conversion_id": "nope"}, 404, "conversion_id"),
]


def test_bad_rendition_requests(client, headers, converted):
    _, conv = converted
    for extra, status, field in BAD_REQUESTS:
        body = dict(dict(conversion_id=conv["id"], start_s=0.0, length_s=1.0, rate_hz=48000),
                    **extra)
        r = _render(client, headers, **body)
        assert r.status_code == status, extra
        assert r.get_json()["error"]["field"] == field, extra
    r = _render(client, headers, recording_id="nope", fs_out=16000, rate_hz=48000)
    assert r.status_code == 404 and r.get_json()["error"]["field"] == "recording_id"


def test_unknown_rendition_or_kind_is_404(client, headers, converted):
    _, conv = converted
    body = _render(client, headers, conversion_id=conv["id"], start_s=0.0, length_s=1.0,
                   rate_hz=48000).get_json()
    assert client.get(f"/api/renditions/{body['id']}/passwd").status_code == 404
    assert client.get("/api/renditions/none/original").status_code == 404
