"""Page batches: several recordings, one design and delivery, each file a conversion; the zip.

References: each file of a batch must equal the single conversion of the same recording with
the same body (one job model: same bytes, compared by sha256); the zip is read back with the
standard library's zipfile (the ZIP format's reference reader here), its stored entries must be
the converted files byte for byte.
"""

import hashlib
import io
import time
import zipfile

import pytest

from webapp.batch.zipstream import zip_chunks


def _wait_batch(client, batch_id, timeout_s=60.0):
    deadline = time.monotonic() + timeout_s
    while True:
        body = client.get(f"/api/batches/{batch_id}").get_json()
        if body["status"] != "running":
            return body
        assert time.monotonic() < deadline, "batch still running"
        time.sleep(0.05)


def test_a_batch_converts_every_recording_like_a_single_conversion(client, headers, recording,
                                                                    wait_done):
    recs = [recording(rate_hz=44100, seconds=1.0, name="one.wav"),
            recording(rate_hz=48000, seconds=1.5, name="two.wav", channels=2),
            recording(rate_hz=96000, seconds=1.0, name="three.wav")]
    body = dict(fs_out=16000, preset="spoken_word_delivery", format="flac",
                delivery={"bits": "16"})
    r = client.post("/api/batches", json=dict(body, recording_ids=[x["id"] for x in recs]),
                    headers=headers)
    assert r.status_code == 202, r.get_json()
    b = _wait_batch(client, r.get_json()["id"])
    assert b["status"] == "done" and b["counts"] == {"done": 3}
    assert b["progress"]["percent"] == 100.0 and b["progress"]["files_done"] == 3
    names = [c["download_name"] for c in b["conversions"]]
    assert names == ["one_16k_16bit.flac", "two_16k_16bit.flac", "three_16k_16bit.flac"]
    # each member is in the history like any conversion
    history = {c["id"] for c in client.get("/api/conversions").get_json()["conversions"]}
    assert {c["id"] for c in b["conversions"]} <= history
    assert client.get("/api/batches").get_json()["batches"][0]["id"] == b["id"]

    single = client.post("/api/conversions", json=dict(body, recording_id=recs[1]["id"]),
                         headers=headers).get_json()
    single = wait_done(single["id"])
    member = client.get(b["conversions"][1]["urls"]["self"]).get_json()
    assert member["figures"]["output_sha256"] == single["figures"]["output_sha256"]

    r = client.get(b["urls"]["zip"])
    assert r.status_code == 200 and r.mimetype == "application/zip"
    with zipfile.ZipFile(io.BytesIO(r.data)) as zf:
        assert zf.namelist() == names
        for info, c in zip(zf.infolist(), b["conversions"]):
            assert info.compress_type == zipfile.ZIP_STORED
            data = zf.read(info)
            full = client.get(c["urls"]["self"]).get_json()
            assert hashlib.sha256(data).hexdigest() == full["figures"]["output_sha256"]


def test_a_batch_is_refused_whole_before_any_work(client, headers, recording):
    a = recording(rate_hz=44100, seconds=0.5, name="same.wav")
    b = recording(rate_hz=48000, seconds=0.5, name="same.wav")
    r = client.post("/api/batches", json=dict(recording_ids=[a["id"], b["id"]], fs_out=16000),
                    headers=headers)
    assert r.status_code == 400
    err = r.get_json()["error"]
    assert err["field"] == "output" and "same_16k" in err["message"]
    assert client.get("/api/conversions").get_json()["conversions"] == []
    r = client.post("/api/batches", json=dict(recording_ids=[], fs_out=16000), headers=headers)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "recording_ids"
    r = client.post("/api/batches", json=dict(recording_ids=[a["id"]], fs_out=16000,
                                              format="opus", delivery={"bits": "16"}),
                    headers=headers)
    assert r.status_code == 400 and "same.wav" in r.get_json()["error"]["message"]
    assert client.get("/api/batches/nope").status_code == 404


def test_a_batch_can_be_cancelled(client, headers, recording):
    recs = [recording(rate_hz=44100, seconds=20.0, name=f"long{i}.wav") for i in range(3)]
    r = client.post("/api/batches", json=dict(recording_ids=[x["id"] for x in recs],
                                              fs_out=48000, preset="archival_master"),
                    headers=headers)
    bid = r.get_json()["id"]
    r = client.post(f"/api/batches/{bid}/cancel", headers=headers)
    assert r.status_code == 200
    b = _wait_batch(client, bid)
    assert b["status"] == "finished" and b["counts"].get("cancelled", 0) >= 2
    assert "done" not in b["counts"] or b["counts"]["done"] <= 1


@pytest.mark.parametrize("sizes", [[0, 5, 3 * (1 << 20) + 17]])
def test_the_zip_streams_in_chunks_with_the_files_intact(tmp_path, sizes):
    paths = []
    for i, n in enumerate(sizes):
        p = tmp_path / f"f{i}.bin"
        p.write_bytes(bytes((i * 7 + k) % 251 for k in range(min(n, 1000))) * (n // 1000)
                      + bytes(n % 1000))
        paths.append(p)
    chunks = list(zip_chunks([(p.name, str(p)) for p in paths], chunk_bytes=1 << 16))
    assert max(len(c) for c in chunks) <= (1 << 16) + 4096     # never the whole archive
    with zipfile.ZipFile(io.BytesIO(b"".join(chunks))) as zf:
        assert zf.testzip() is None
        for p in paths:
            assert zf.read(p.name) == p.read_bytes()
