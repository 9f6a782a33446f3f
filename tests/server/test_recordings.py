"""POST/GET/DELETE /api/recordings: probe figures, loudness, range requests and every bad upload.

References: soundfile (libsndfile) reads the stored file back; ITU-R BS.1770-4 for the
loudness of a 997 Hz sine (a full-scale sine in one channel reads -3.01 LKFS, stated in the
recommendation's calibration note); physics for the peak of a sine.
"""

import io
import os
import struct

import numpy as np
import pytest
import soundfile as sf


def _error(r, status, field):
    assert r.status_code == status, r.get_data(as_text=True)
    err = r.get_json()["error"]
    assert err["field"] == field
    assert err["message"]
    return err["message"]


def _stored_files(app):
    return sorted(os.listdir(app.extensions["rateferry"].store.uploads))


def test_upload_probes_and_measures_the_file(app, upload, audio_bytes, tone):
    x = tone(48000, 3.0, freqs_hz=(997.0,), amplitude=0.5)
    r = upload(audio_bytes(x, 48000, subtype="FLOAT"), "interview take 1.wav")
    assert r.status_code == 201
    rec = r.get_json()
    assert (rec["rate_hz"], rec["channels"], rec["frames"]) == (48000, 1, 144000)
    assert rec["duration_s"] == pytest.approx(3.0)
    assert (rec["format"], rec["subtype"]) == ("WAV", "FLOAT")
    assert rec["name"] == "interview take 1.wav" and rec["demo"] is False
    # BS.1770-4: full-scale 997 Hz sine in one channel -> -3.01 LKFS; half scale -6.02 dB lower
    assert rec["integrated_lufs"] == pytest.approx(-3.01 - 6.02, abs=0.05)
    # physics: the peak of a 0.5 sine is 20 log10(0.5) = -6.02 dB (true peak within 0.1 dB)
    assert rec["sample_peak_dbfs"] == pytest.approx(-6.02, abs=0.01)
    assert rec["true_peak_dbtp"] == pytest.approx(-6.02, abs=0.1)
    assert rec["analysis"] == "done"
    # stored once under a generated name, byte for byte what was sent
    files = _stored_files(app)
    assert len(files) == 1 and files[0] != "interview take 1.wav" and files[0].endswith(".wav")
    data, rate = sf.read(os.path.join(app.extensions["rateferry"].store.uploads, files[0]))
    assert rate == 48000 and np.array_equal(data, x[:, 0].astype(np.float32))


def test_recordings_can_be_listed_fetched_and_deleted(client, recording, headers, app):
    a = recording(name="a.wav")
    b = recording(name="b.flac" if False else "b.wav")
    listed = client.get("/api/recordings").get_json()["recordings"]
    assert [r["id"] for r in listed][:2] == [b["id"], a["id"]]
    assert client.get(f"/api/recordings/{a['id']}").get_json()["name"] == "a.wav"
    r = client.delete(f"/api/recordings/{a['id']}", headers=headers)
    assert r.status_code == 200 and r.get_json() == {"deleted": a["id"]}
    assert client.get(f"/api/recordings/{a['id']}").status_code == 404
    assert len(_stored_files(app)) == 1


def test_recording_audio_supports_range_requests(client, recording, app):
    rec = recording(name="seek.wav")
    path = os.path.join(app.extensions["rateferry"].store.uploads, _stored_files(app)[0])
    size = os.path.getsize(path)
    r = client.get(rec["audio_url"], headers={"Range": "bytes=100-299"})
    assert r.status_code == 206
    assert r.headers["Content-Range"] == f"bytes 100-299/{size}"
    with open(path, "rb") as f:
        f.seek(100)
        assert r.data == f.read(200)
    assert r.headers["Accept-Ranges"] == "bytes"
    full = client.get(rec["audio_url"])
    assert full.status_code == 200 and len(full.data) == size and full.mimetype == "audio/wav"
    tail = client.get(rec["audio_url"], headers={"Range": "bytes=-10"})
    assert tail.status_code == 206 and len(tail.data) == 10


def test_path_like_names_are_text_only(app, upload, audio_bytes, tone, tmp_path):
    data = audio_bytes(tone(44100, 0.5), 44100)
    for name in ("../../etc/passwd.wav", "..\\..\\windows\\evil.wav", "/abs/path/x.wav"):
        r = upload(data, name)
        assert r.status_code == 201
        rec = r.get_json()
        assert "/" not in rec["name"] and "\\" not in rec["name"]
    assert not (tmp_path / "etc").exists()
    uploads = app.extensions["rateferry"].store.uploads
    for f in _stored_files(app):
        assert os.path.dirname(os.path.realpath(os.path.join(uploads, f))) == \
            os.path.realpath(uploads)
        assert "passwd" not in f and "evil" not in f


# ---------------------------------------------------------------------------------------------
# bad uploads: each is a 4xx JSON naming the field, and leaves no file behind

def test_truncated_wav_header_is_refused(app, upload, wav_header):
    msg = _error(upload(wav_header(44100, 1, data=b"\0" * 400)[:30], "cut.wav"), 400, "file")
    assert "cut.wav" in msg
    assert _stored_files(app) == []


def test_non_audio_bytes_are_refused(app, upload, rng):
    msg = _error(upload(rng.bytes(4096), "noise.wav"), 400, "file")
    assert "not a recognised audio format" in msg and "noise.wav" in msg
    _error(upload(b"<html>not audio</html>" * 50, "page.flac"), 400, "file")
    assert _stored_files(app) == []


@pytest.mark.parametrize("name", ["notes.txt", "take.wav.exe", "no_extension", "archive.zip"])
def test_wrong_extension_is_unsupported_media(app, upload, audio_bytes, tone, name):
    msg = _error(upload(audio_bytes(tone(44100, 0.2), 44100), name), 415, "file")
    assert "file type must be one of" in msg
    assert _stored_files(app) == []


def test_empty_file_is_refused(app, upload):
    msg = _error(upload(b"", "empty.wav"), 400, "file")
    assert "empty" in msg
    assert _stored_files(app) == []


def test_nan_samples_are_refused(app, upload, audio_bytes, tone):
    x = tone(44100, 1.0)
    x[12345, 0] = np.nan
    msg = _error(upload(audio_bytes(x, 44100, subtype="FLOAT"), "nan.wav"), 400, "file")
    assert "non-finite" in msg and "12345" in msg
    assert _stored_files(app) == []


@pytest.mark.parametrize("rate_hz", [5, 999, 10_000_000])
def test_absurd_rate_is_refused(app, upload, wav_header, rate_hz):
    msg = _error(upload(wav_header(rate_hz, 1, data=b"\0" * 800), "odd.wav"), 400, "rate_hz")
    assert str(rate_hz) in msg and "odd.wav" in msg
    assert _stored_files(app) == []


def test_zero_channels_are_refused(app, upload, wav_header):
    data = wav_header(44100, 1, data=b"\0" * 800)
    data = data[:22] + struct.pack("<H", 0) + data[24:]  # nChannels of the fmt chunk
    msg = _error(upload(data, "none.wav"), 400, "file")
    assert "zero" in msg.lower() or "0 channels" in msg
    assert _stored_files(app) == []


def test_zero_frames_are_refused(app, upload, wav_header):
    msg = _error(upload(wav_header(44100, 2), "silent.wav"), 400, "file")
    assert "0 frames" in msg


def test_too_large_upload_is_413(make_app, audio_bytes, tone):
    app = make_app(MAX_CONTENT_LENGTH=4096)
    c = app.test_client()
    r = c.post("/api/recordings",
               data={"file": (io.BytesIO(audio_bytes(tone(44100, 1.0), 44100)), "big.wav")},
               headers={"X-Rateferry-Token": app.config["PAGE_TOKEN"]},
               content_type="multipart/form-data")
    assert r.status_code == 413
    err = r.get_json()["error"]
    assert err["field"] == "file" and "4096" in err["message"]
    assert _stored_files(app) == []


def test_upload_without_a_file_field_is_refused(client, headers):
    r = client.post("/api/recordings", data={"other": "x"}, headers=headers,
                    content_type="multipart/form-data")
    _error(r, 400, "file")


def test_unknown_recording_is_404(client, headers):
    for r in (client.get("/api/recordings/doesnotexist"),
              client.get("/api/recordings/doesnotexist/audio"),
              client.delete("/api/recordings/doesnotexist", headers=headers)):
        _error(r, 404, "recording_id")


def test_demo_recording_cant_be_deleted(make_app, tmp_path):
    folder = tmp_path / "demo"
    folder.mkdir()
    sf.write(folder / "d.wav", np.zeros(4410), 44100)
    app = make_app(LOAD_DEMO=True, DEMO_MEDIA=str(folder))
    demo = app.extensions["rateferry"].demo_id
    r = app.test_client().delete(f"/api/recordings/{demo}",
                                 headers={"X-Rateferry-Token": app.config["PAGE_TOKEN"]})
    _error(r, 409, "recording_id")
    assert (folder / "d.wav").exists()


def test_long_uploads_are_measured_in_the_background(make_app, audio_bytes, tone):
    app = make_app(ANALYSE_SYNC_MAX_S=0.5)
    c = app.test_client()
    r = c.post("/api/recordings",
               data={"file": (io.BytesIO(audio_bytes(tone(8000, 2.0, freqs_hz=(997.0,),
                                                          amplitude=0.5), 8000)), "long.wav")},
               headers={"X-Rateferry-Token": app.config["PAGE_TOKEN"]},
               content_type="multipart/form-data")
    assert r.status_code == 201
    rid = r.get_json()["id"]
    app.extensions["rateferry"].background.submit(lambda: None).result(timeout=30)
    rec = c.get(f"/api/recordings/{rid}").get_json()
    assert rec["analysis"] == "done"
    assert rec["sample_peak_dbfs"] == pytest.approx(-6.02, abs=0.01)
