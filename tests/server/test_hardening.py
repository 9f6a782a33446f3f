"""Regression tests for the hardening findings: no 5xx for any request, limits that hold.

The fixture ``make_app`` fails any test whose app answered a 5xx, so each case below also
checks "not a 500". Outside facts used: JSON has no NaN/Infinity and Python's float() of
1e999 is inf (IEEE 754 binary64 overflows above about 1.8e308); HTTP 410 Gone, 413 Content Too
Large (RFC 9110 sections 15.5.11, 15.5.14), 429 Too Many Requests with Retry-After
(RFC 6585 section 4, RFC 9110 section 10.2.3).
"""

import errno
import http.client
import io
import json
import os
import socket
import time

import pytest
import soundfile as sf

HUGE = "1" + "0" * 399          # a 400-digit integer
BAD_NUMBERS = ['"inf"', '"nan"', "1e999", "-1e999", HUGE, "-" + HUGE, '"1e999"', f'"{HUGE}"']


def _post(client, headers, url, text):
    return client.post(url, data=text, headers=headers, content_type="application/json")


def _is_400_naming(response, field):
    body = response.get_json()
    return (response.status_code == 400 and body["error"]["field"] == field
            and field.split(".")[-1] in body["error"]["message"])


# --------------------------------------------------------------------------------------------
# the numbers that raised OverflowError (28 requests answered 500)

@pytest.fixture
def rec(recording):
    return recording(rate_hz=44100, seconds=1.0)


def _cases(rid):
    """(url, body template with @V@, field) for every number field the findings named."""
    base = f'"recording_id": "{rid}", "fs_out": 48000'
    return [
        ("/api/designs", '{"fs_in": 44100, "fs_out": @V@, "plans": false}', "fs_out"),
        ("/api/designs", '{"fs_in": @V@, "fs_out": 48000, "plans": false}', "fs_in"),
        ("/api/designs", '{"fs_in": 44100, "fs_out": 48000, "spec": {"attenuation_db": @V@}}',
         "attenuation_db"),
        ("/api/designs", '{"fs_in": 44100, "fs_out": 48000, "spec": {"ripple_db": @V@}}',
         "ripple_db"),
        ("/api/designs", '{"fs_in": 44100, "fs_out": 48000, "spec": {"passband_hz": @V@}}',
         "passband_hz"),
        ("/api/audits", '{"fs_in": 44100, "fs_out": 48000, "seed": @V@}', "seed"),
        ("/api/spectra", "{" + base + ', "start_s": @V@}', "start_s"),
        ("/api/spectra", "{" + base + ', "length_s": @V@}', "length_s"),
        ("/api/conversions", "{" + base + ', "delivery": {"ceiling_dbtp": @V@}}', "ceiling_dbtp"),
        ("/api/conversions", "{" + base + ', "delivery": {"loudness_lufs": @V@}}',
         "loudness_lufs"),
        ("/api/renditions", "{" + base + ', "rate_hz": 48000, "start_s": @V@}', "start_s"),
        ("/api/renditions", "{" + base + ', "rate_hz": @V@}', "rate_hz"),
        ("/api/maintenance/clear", '{"older_than_days": @V@}', "older_than_days"),
    ]


def test_non_finite_and_overflowing_numbers_are_400_naming_the_field(client, headers, rec):
    seen = 0
    for url, template, field in _cases(rec["id"]):
        for value in BAD_NUMBERS:
            r = _post(client, headers, url, template.replace("@V@", value))
            assert _is_400_naming(r, field), (url, field, value[:12], r.get_json())
            seen += 1
    assert seen == 13 * 8


def test_a_huge_trials_count_is_400(client, headers, rec, wait_done):
    conv = client.post("/api/conversions", json={"recording_id": rec["id"], "fs_out": 48000,
                                                 "preset": "quick_preview"},
                       headers=headers).get_json()
    wait_done(conv["id"])
    url = f"/api/conversions/{conv['id']}/blind_trials"
    for value in (HUGE, "1e999", '"inf"', "16.5"):
        r = _post(client, headers, url, '{"trials": @V@, "correct": 1}'.replace("@V@", value))
        assert _is_400_naming(r, "trials"), r.get_json()
    r = _post(client, headers, url, '{"trials": 16, "correct": ' + HUGE + "}")
    assert _is_400_naming(r, "correct")
    r = _post(client, headers, url, "[" * 100000)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "body"


def test_nan_and_infinity_literals_are_not_json(client, headers):
    for literal in ("NaN", "Infinity", "-Infinity"):
        r = _post(client, headers, "/api/designs",
                  '{"fs_in": 44100, "fs_out": 48000, "spec": {"ripple_db": %s}}' % literal)
        assert r.status_code == 400 and r.get_json()["error"]["field"] == "body"
        assert f"{literal} is not a JSON number" in r.get_json()["error"]["message"]


# --------------------------------------------------------------------------------------------
# deep JSON (RecursionError)

JSON_POSTS = ["/api/designs", "/api/audits", "/api/spectra", "/api/conversions",
              "/api/renditions", "/api/maintenance/clear"]


@pytest.mark.parametrize("url", JSON_POSTS)
def test_deeply_nested_json_is_400_on_every_json_post(client, headers, url):
    r = _post(client, headers, url, "[" * 100000)
    body = r.get_json()
    assert r.status_code == 400, body
    assert body["error"] == {"message": "the request body nests 100000 levels deep; JSON may "
                                        "nest at most 64 levels", "field": "body"}


def test_nesting_inside_strings_does_not_count(client, headers):
    r = _post(client, headers, "/api/maintenance/clear",
              json.dumps({"older_than_days": 3650, "note": "[" * 5000}))
    assert r.status_code == 200 and r.get_json()["older_than_days"] == 3650.0


def test_deeply_nested_recipe_upload_is_400(client, headers):
    for text in ("[" * 100000, '{"a":' * 100000):
        r = client.post("/api/recipes", data={"file": (io.BytesIO(text.encode()), "r.json")},
                        headers=headers, content_type="multipart/form-data")
        body = r.get_json()
        assert r.status_code == 400 and body["error"]["field"] == "recipe"
        assert "nests 100000 levels deep; JSON may nest at most 64 levels" in \
            body["error"]["message"]


# --------------------------------------------------------------------------------------------
# a recording whose stored file is gone

def test_audio_of_a_recording_removed_from_disk_is_410(client, headers, rec):
    get = client.get(f"/api/recordings/{rec['id']}/audio")
    assert get.status_code == 200 and get.data[:4] == b"RIFF"
    get.close()
    path = client.application.extensions["rateferry"].store.open().get_recording(rec["id"])["path"]
    os.unlink(path)
    r = client.get(f"/api/recordings/{rec['id']}/audio")
    assert r.status_code == 410
    assert r.get_json()["error"] == {
        "message": "the audio of recording 'take.wav' is no longer on disk (it was removed "
                   "outside the app); upload it again", "field": "recording_id"}
    for url, body in (("/api/spectra", {"recording_id": rec["id"], "fs_out": 48000}),
                      ("/api/conversions", {"recording_id": rec["id"], "fs_out": 48000}),
                      ("/api/renditions", {"recording_id": rec["id"], "fs_out": 48000,
                                           "rate_hz": 48000})):
        r = client.post(url, json=body, headers=headers)
        assert r.status_code == 410 and r.get_json()["error"]["field"] == "recording_id"


# --------------------------------------------------------------------------------------------
# upload names

def test_an_upload_name_over_200_characters_keeps_its_extension(upload, audio_bytes, tone):
    name = "a" * 300 + ".wav"
    r = upload(audio_bytes(tone(44100, 0.5), 44100), name)
    assert r.status_code == 201, r.get_json()
    assert r.get_json()["name"] == "a" * 196 + ".wav"


# --------------------------------------------------------------------------------------------
# one upload limit, app and waitress alike

def _raw(base, head, body_chunks=()):
    """Send a raw request (head: bytes up to the blank line); return (status, headers, body)."""
    host, port = base.rsplit("/", 1)[-1].split(":")
    with socket.create_connection((host, int(port)), timeout=30) as s:
        s.sendall(head)
        try:
            for chunk in body_chunks:
                s.sendall(chunk)
        except (BrokenPipeError, ConnectionResetError):
            pass   # the server refused mid-body and closed: its answer is already sent
        data = b""
        try:
            while True:
                part = s.recv(65536)
                if not part:
                    break
                data += part
        except ConnectionResetError:
            pass
    head_text, _, body = data.partition(b"\r\n\r\n")
    lines = head_text.decode("latin-1").split("\r\n")
    status = int(lines[0].split()[1])
    hdrs = {k.strip().lower(): v.strip() for k, v in (ln.split(":", 1) for ln in lines[1:])}
    return status, hdrs, body


def test_upload_over_the_limit_is_json_413_from_waitress_and_from_the_app(live_server):
    limit = 1 << 20
    app, base = live_server(MAX_CONTENT_LENGTH=limit)
    port = base.rsplit(":", 1)[1]
    token = app.config["PAGE_TOKEN"]
    want = {"error": {"message": f"the upload is larger than the limit of {limit} bytes",
                      "field": "file"}}
    # declared length over the limit: waitress refuses before reading the body
    head = (f"POST /api/recordings HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n"
            f"X-Rateferry-Token: {token}\r\nContent-Type: multipart/form-data; boundary=x\r\n"
            f"Content-Length: {3 * limit}\r\n\r\n").encode()
    status, hdrs, body = _raw(base, head)
    assert status == 413 and hdrs["content-type"] == "application/json"
    assert json.loads(body) == want
    # a chunked body (no declared length) that grows past the limit
    head = (f"POST /api/recordings HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n"
            f"X-Rateferry-Token: {token}\r\nContent-Type: multipart/form-data; boundary=x\r\n"
            "Transfer-Encoding: chunked\r\n\r\n").encode()
    chunk = b"10000\r\n" + b"x" * 0x10000 + b"\r\n"
    status, hdrs, body = _raw(base, head, [chunk] * 40 + [b"0\r\n\r\n"])
    assert status == 413 and json.loads(body) == want
    # and the app's own check (the test client, no waitress) gives the same answer
    r = app.test_client().post("/api/recordings", headers={"X-Rateferry-Token": token},
                               data={"file": (io.BytesIO(b"\0" * (limit + 1)), "big.wav")},
                               content_type="multipart/form-data", base_url=base)
    assert r.status_code == 413 and r.get_json() == want
    assert app.config["MAX_CONTENT_LENGTH"] == limit


# --------------------------------------------------------------------------------------------
# progress streams can't starve the server

def _queued_conversion(app, rec):
    """A conversion row left queued (no worker takes it), so its stream stays open."""
    store = app.extensions["rateferry"].store
    with store.open() as db:
        db.add_conversion(conversion_id="waiting1", recording_id=rec["id"], design_id=None,
                          fs_in=44100, fs_out=48000, format="flac", spec={}, delivery={},
                          output_path=os.path.join(store.outputs, "waiting1.flac"),
                          download_name="w_48k.flac", frames_total=44100)
    return "waiting1"


def _open_stream(base, cid):
    host, port = base.rsplit("/", 1)[-1].split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=30)
    conn.request("GET", f"/api/conversions/{cid}/events")
    return conn, conn.getresponse()


def test_ten_open_streams_leave_the_server_answering(live_server, upload, audio_bytes, tone):
    app, base = live_server(SSE_MAX_STREAMS=6, SSE_MAX_S=3.0, SSE_INTERVAL_S=0.05)
    client = app.test_client()
    r = client.post("/api/recordings", headers={"X-Rateferry-Token": app.config["PAGE_TOKEN"]},
                    data={"file": (io.BytesIO(audio_bytes(tone(44100, 0.5), 44100)), "a.wav")},
                    content_type="multipart/form-data", base_url=base)
    cid = _queued_conversion(app, r.get_json())
    streams = [_open_stream(base, cid) for _ in range(10)]
    try:
        statuses = sorted(resp.status for _, resp in streams)
        assert statuses == [200] * 6 + [429] * 4
        for _, resp in streams:
            if resp.status == 429:
                assert resp.getheader("Retry-After") == "5"
                assert json.loads(resp.read())["error"]["field"] == "events"
        assert app.extensions["rateferry"].streams.open == 6
        # the server still answers at once while six streams hold their threads
        host, port = base.rsplit("/", 1)[-1].split(":")
        conn = http.client.HTTPConnection(host, int(port), timeout=5)
        conn.request("GET", "/api/health")
        health = conn.getresponse()
        assert health.status == 200 and json.loads(health.read())["status"] == "ok"
        conn.close()
        # streams end after SSE_MAX_S and give their slots back
        for _, resp in streams:
            if resp.status == 200:
                resp.read()   # returns when the server ends the stream
        deadline = time.monotonic() + 10
        while app.extensions["rateferry"].streams.open and time.monotonic() < deadline:
            time.sleep(0.05)
        assert app.extensions["rateferry"].streams.open == 0
    finally:
        for conn, _ in streams:
            conn.close()


# --------------------------------------------------------------------------------------------
# messages that name the cause

def test_a_wav_shorter_than_its_header_converts_with_a_warning(client, headers, upload,
                                                               audio_bytes, tone, wait_done):
    full = audio_bytes(tone(44100, 1.0), 44100, subtype="PCM_16")
    cut = full[:44 + 2 * 22050]   # the canonical 44-byte header, then half of the samples
    rec = upload(cut, "cut.wav").get_json()
    assert rec["frames"] == 22050   # libsndfile trims the count to the data there
    conv = client.post("/api/conversions", json={"recording_id": rec["id"], "fs_out": 48000,
                                                 "preset": "quick_preview"},
                       headers=headers).get_json()
    done = wait_done(conv["id"])
    assert done["status"] == "done", done
    (warning,) = done["figures"]["warnings"]
    assert "is shorter than its header declares: 22050 of 44100 frames" in warning


def test_os_errors_are_told_by_their_cause(tmp_path):
    from webapp.oserrors import os_error_text, write_failure
    try:
        with open("/dev/full", "wb") as f:   # a real ENOSPC: writes to /dev/full always fail
            f.write(b"x" * 8192)
            f.flush()
    except OSError as exc:
        assert exc.errno == errno.ENOSPC
        assert os_error_text(exc, "/dev/full") == "no space left on the device holding '/dev'"
    else:
        pytest.skip("no /dev/full here")
    assert write_failure(PermissionError(errno.EACCES, "Permission denied"),
                         tmp_path / "x.wav") == "permission denied on 'x.wav'"
    assert write_failure(RuntimeError("System error."), tmp_path / "x.wav") == "System error"


def test_a_full_disk_is_named_in_the_conversion_error(tmp_path, tone):
    """A real full device: a 256 KiB tmpfs (needs the right to mount; skipped without it)."""
    import subprocess
    from webapp.dsp.errors import AudioFileError
    from webapp.jobs import convert_file
    small = tmp_path / "small"
    small.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(small)],
                      capture_output=True).returncode != 0:
        pytest.skip("can't mount a small tmpfs here")
    try:
        source = tmp_path / "in.wav"
        sf.write(source, tone(44100, 5.0), 44100, subtype="PCM_24")
        with pytest.raises(AudioFileError) as info:
            convert_file(source, small / "out.wav", fs_out=48000)
        assert f"no space left on the device holding '{small}'" in info.value.message
        assert os.listdir(small) == []   # nothing left: no output, no partial
    finally:
        subprocess.run(["umount", str(small)], check=False)


def test_permission_denied_names_the_file(tone):
    """Reading a file the user may not read, as an unprivileged user (root reads anything)."""
    import shutil
    import subprocess
    import sys
    import tempfile
    folder = tempfile.mkdtemp(prefix="rateferry-perm-")   # reachable by the other user
    try:
        os.chmod(folder, 0o777)
        source = os.path.join(folder, "locked.wav")
        sf.write(source, tone(44100, 0.2), 44100, subtype="PCM_16")
        os.chmod(source, 0)
        # the interpreter may live where the other user can't read: import first, then switch
        code = ("import os, sys; from webapp.cli import main; import webapp.pipeline, "
                "webapp.sheet; os.setgid(65534); os.setuid(65534); sys.exit(main())")
        env = dict(os.environ, PYTHONPATH=os.getcwd(),
                   RATEFERRY_STATE_DIR=os.path.join(folder, "state"))
        proc = subprocess.run([sys.executable, "-c", code, "convert", source,
                               os.path.join(folder, "out.wav"), "--to", "48000", "--quiet"],
                              capture_output=True, text=True, env=env, timeout=120)
        if "PermissionError" in proc.stderr and "setgid" in proc.stderr:
            pytest.skip("can't switch to an unprivileged user here")
        assert proc.returncode == 2, proc.stderr
        assert proc.stderr == ("rateferry: error: cannot read 'locked.wav': permission denied "
                               "on 'locked.wav'\n")
        assert sorted(os.listdir(folder)) == ["locked.wav"]
    finally:
        shutil.rmtree(folder, ignore_errors=True)


# --------------------------------------------------------------------------------------------
# found by the soak (benchmarks/soak_server.py): a same-rate route with transition aliasing

def test_same_rate_route_with_transition_aliasing_is_designed_not_500(client, headers):
    # lower rate - passband (48000 - 20400 Hz) lies above the filter's Nyquist (24000 Hz):
    # the stopband is held at that Nyquist (sampling theorem) instead of reaching scipy.firwin
    r = client.post("/api/designs", json={"fs_in": 48000, "fs_out": 48000,
                                          "preset": "quick_preview", "plans": False},
                    headers=headers)
    assert r.status_code == 200, r.get_json()
    assert r.get_json()["mask"]["stopband_hz"] == 24000.0
    r = client.post("/api/designs", json={"fs_in": 48000, "fs_out": 48000, "plans": False,
                                          "spec": {"passband_hz": 10000, "stopband_hz": 30000}},
                    headers=headers)
    assert _is_400_naming(r, "stopband_hz")
    assert "at most half the filter's rate (24000 Hz" in r.get_json()["error"]["message"]


def test_a_recording_deleted_during_a_request_is_410_naming_it(app, tmp_path):
    """Found by the 30-minute soak: one client deleted a recording while another's spectra were
    being computed; the answer named the stored file. Now: 410 naming the recording."""
    from webapp.dsp.errors import AudioFileError
    from webapp.server.errors import ApiError
    from webapp.server.params import while_on_disk
    path = tmp_path / "stored.wav"
    sf.write(path, [0.0] * 100, 8000)
    rec = {"path": str(path), "name": "Harbour take.wav"}
    with app.app_context():
        try:
            with while_on_disk(rec):
                path.unlink()                 # the other request's delete
                raise AudioFileError("cannot open 'stored.wav': no such file", "path")
        except ApiError as exc:
            assert exc.status == 410 and "'Harbour take.wav' was deleted" in exc.message
            assert exc.field == "recording_id"
        else:
            raise AssertionError("no 410")
