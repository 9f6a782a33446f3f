"""The SQLite store across restarts, recovery of interrupted conversions, clearing old files,
and the serve entry point (a real waitress process on a free port)."""

import json
import os
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request

import pytest

from webapp import store as jobs
from webapp.store import INTERRUPTED_MESSAGE, Store, clear_old
from webapp.server.run import serve


def _convert(client, headers, rec, wait_done, **extra):
    body = dict(recording_id=rec["id"], fs_out=16000, format="flac", preset="quick_preview")
    body.update(extra)
    cid = client.post("/api/conversions", json=body, headers=headers).get_json()["id"]
    return wait_done(cid)


def test_everything_survives_a_restart(make_app, recording, client, headers, wait_done):
    rec = recording(rate_hz=48000, seconds=0.5, name="keep.wav")
    done = _convert(client, headers, rec, wait_done)
    client.post(done["urls"]["blind_trials"], json={"trials": 6, "correct": 4},
                headers=headers)
    design = client.post("/api/designs", json={"fs_in": 48000, "fs_out": 16000,
                                               "preset": "quick_preview", "plans": False},
                         headers=headers).get_json()

    again = make_app().test_client()
    assert again.get(f"/api/recordings/{rec['id']}").get_json()["name"] == "keep.wav"
    after = again.get(f"/api/conversions/{done['id']}").get_json()
    assert after["status"] == "done" and after["figures"] == done["figures"]
    assert again.get(done["urls"]["download"]).status_code == 200
    trials = again.get(done["urls"]["blind_trials"]).get_json()["blind_trials"]
    assert [(t["trials"], t["correct"]) for t in trials] == [(6, 4)]
    # designs are deterministic: recomputed after the restart, the same figures but the timing
    recomputed = again.get(f"/api/designs/{design['id']}?plans=false").get_json()["figures"]
    recomputed.pop("design_ms"), design["figures"].pop("design_ms")
    assert recomputed == design["figures"]


def test_sheet_after_a_restart_is_rebuilt_from_the_store(make_app, recording, client, headers,
                                                         wait_done):
    import webapp.sheet  # noqa: F401  (the recipe is written beside the output)
    rec = recording(rate_hz=48000, seconds=0.5)
    done = _convert(client, headers, rec, wait_done)
    again = make_app().test_client()
    r = again.get(done["urls"]["sheet"])
    assert r.status_code == 200
    assert done["figures"]["output_sha256"] in r.get_data(as_text=True)


def test_interrupted_conversion_is_marked_failed_and_its_partial_output_removed(
        make_app, app, recording, client, headers, wait_done):
    rec = recording(rate_hz=48000, seconds=0.5)
    done = _convert(client, headers, rec, wait_done)
    store = app.extensions["rateferry"].store
    # a crash mid-way: a row left running and the writer's temporary file beside the target
    with store.open() as db:
        db.add_conversion(conversion_id="crashed1", recording_id=rec["id"], design_id=None,
                          fs_in=48000, fs_out=16000, format="flac", spec={}, delivery={},
                          output_path=os.path.join(store.outputs, "crashed1.flac"),
                          download_name="x_16k.flac", frames_total=24000)
        db.conn.execute("UPDATE conversions SET status='running' WHERE id='crashed1'")
        db.add_conversion(conversion_id="queued1", recording_id=rec["id"], design_id=None,
                          fs_in=48000, fs_out=16000, format="flac", spec={}, delivery={},
                          output_path=os.path.join(store.outputs, "queued1.flac"),
                          download_name="y_16k.flac", frames_total=24000)
    # the writer's partial file and its lock naming a process that has ended (pid 2**22 + 1
    # is above Linux's pid_max default of 2**22, so no process has it)
    pfolder = os.path.join(store.outputs, ".rateferry-partial")
    os.makedirs(pfolder, exist_ok=True)
    partial = os.path.join(pfolder, "crashed1.0123456789ab.flac.partial")
    with open(partial, "wb") as f:
        f.write(b"half a file")
    with open(os.path.join(pfolder, "crashed1.0123456789ab.lock"), "w") as f:
        json.dump({"pid": 2**22 + 1, "started": None, "boot": None}, f)
    kept = os.path.join(store.outputs, done["id"] + ".flac")

    restarted = make_app()
    assert sorted(restarted.extensions["rateferry"].interrupted) == ["crashed1", "queued1"]
    c = restarted.test_client()
    for cid in ("crashed1", "queued1"):
        body = c.get(f"/api/conversions/{cid}").get_json()
        assert body["status"] == "failed"
        assert body["error"] == {"message": INTERRUPTED_MESSAGE, "field": "conversion"}
    assert not os.path.exists(partial)
    assert os.path.exists(kept)  # a finished conversion is untouched
    assert c.get(f"/api/conversions/{done['id']}").get_json()["status"] == "done"


def _age(store, table, days):
    with store.open() as db:
        db.conn.execute(f"UPDATE {table} SET created = created - ?", (days * 86400.0,))


def test_clear_old_removes_old_files_and_rows_only(app, client, headers, recording, wait_done,
                                                   instance):
    old = recording(rate_hz=48000, seconds=0.5, name="old.wav")
    done = _convert(client, headers, old, wait_done)
    store = app.extensions["rateferry"].store
    _age(store, "recordings", 10)
    _age(store, "conversions", 10)
    fresh = recording(rate_hz=48000, seconds=0.5, name="fresh.wav")
    stray = os.path.join(store.uploads, ".incoming-stray")
    with open(stray, "wb") as f:
        f.write(b"x")
    os.utime(stray, (time.time() - 20 * 86400,) * 2)

    removed = clear_old(str(instance), older_than_days=7)
    # the old upload, its output, its recipe and the stray file
    assert removed == 4
    assert client.get(f"/api/recordings/{old['id']}").status_code == 404
    assert client.get(f"/api/conversions/{done['id']}").status_code == 404
    assert client.get(f"/api/recordings/{fresh['id']}").status_code == 200
    assert not os.path.exists(stray)
    assert os.listdir(store.outputs) == []
    assert len(os.listdir(store.uploads)) == 1
    assert clear_old(str(instance), older_than_days=7) == 0


def test_clear_endpoint_and_bad_days(app, client, headers, recording):
    rec = recording(rate_hz=48000, seconds=0.5)
    _age(app.extensions["rateferry"].store, "recordings", 3)
    r = client.post("/api/maintenance/clear", json={"older_than_days": 1}, headers=headers)
    assert r.status_code == 200 and r.get_json()["removed_files"] == 1
    assert client.get(f"/api/recordings/{rec['id']}").status_code == 404
    r = client.post("/api/maintenance/clear", json={"older_than_days": -1}, headers=headers)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "older_than_days"
    with pytest.raises(ValueError, match="older_than_days"):
        clear_old(app.instance_path, older_than_days=float("nan"))


def test_clear_keeps_running_conversions_and_the_demo(tmp_path):
    store = Store(str(tmp_path / "inst"))
    src = tmp_path / "demo.wav"
    src.write_bytes(b"RIFF")
    with store.open() as db:
        db.conn.execute(
            "INSERT INTO recordings (id, name, path, owned, demo, size_bytes, mtime, probe_json, "
            "meters_json, created) VALUES ('d', 'demo.wav', ?, 0, 1, 4, 0, '{}', '{}', 0)",
            (str(src),))
    assert clear_old(store.instance_path, older_than_days=0) == 0
    assert src.exists()


def test_ids_are_unguessable():
    ids = {jobs.new_id() for _ in range(1000)}
    assert len(ids) == 1000
    assert all(len(i) >= 22 and all(ch.isalnum() or ch in "-_" for ch in i) for i in ids)


# ---------------------------------------------------------------------------------------------
# serve

def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_serve_refuses_a_busy_port_with_a_clear_message(capsys, tmp_path):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        code = serve(port=port, open_browser=False, instance_path=str(tmp_path))
    assert code == 2
    err = capsys.readouterr().err
    assert f"port {port} on 127.0.0.1 is already in use" in err


def test_serve_refuses_a_non_loopback_host(tmp_path):
    with pytest.raises(ValueError, match="host must be one of"):
        serve(host="0.0.0.0", port=_free_port(), open_browser=False,
              instance_path=str(tmp_path))


def test_python_m_webapp_serves_with_waitress_on_loopback(tmp_path):
    port = _free_port()
    env = dict(os.environ, RATEFERRY_INSTANCE=str(tmp_path / "inst"))
    proc = subprocess.Popen([sys.executable, "-m", "webapp", "--no-browser", "--port",
                             str(port)], cwd=os.path.dirname(os.path.dirname(
                                 os.path.dirname(os.path.abspath(__file__)))),
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/health",
                                            timeout=2) as r:
                    assert json.load(r)["status"] == "ok"
                    assert r.headers["Server"] == "rateferry"  # waitress, named by serve()
                    break
            except (urllib.error.URLError, ConnectionError):
                assert proc.poll() is None, proc.stderr.read().decode()
                assert time.monotonic() < deadline
                time.sleep(0.2)
        req = urllib.request.Request(f"http://127.0.0.1:{port}/api/health",
                                     headers={"Host": f"attacker.example:{port}"})
        with pytest.raises(urllib.error.HTTPError) as info:
            urllib.request.urlopen(req, timeout=5)
        assert info.value.code == 403
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    assert "already in use" not in proc.stderr.read().decode()
