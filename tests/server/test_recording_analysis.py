"""POST /api/recordings with the overview's `columns`: one read of the file gives the meters and
the overview, and GET .../overview answers from it (a long file's waits for its analysis).

References: the separate computations, webapp.server.library.measure for the meters (the
pipeline's measure_file, as an upload without columns runs it: BS.1770 loudness and true peak,
checked against ITU-R BS.1770-4 and pyloudnorm in tests/dsp/test_loudness.py) and
webapp.overview.overview for the picture. BS.1770-4: a 997 Hz
sine of amplitude A in one channel reads 20 log10(A) - 3.01 LKFS.
"""

import io
import os
import threading

import numpy as np
import pytest

from webapp import media
from webapp.jsontools import jsonable
from webapp.overview import overview
from webapp.server.library import measure


def _post(client, headers, data, name, **fields):
    return client.post("/api/recordings", headers=headers, content_type="multipart/form-data",
                       data=dict(fields, file=(io.BytesIO(data), name)))


def _stored(app, rec):
    with app.extensions["rateferry"].store.open() as db:
        return db.get_recording(rec["id"])["path"]


def _picture(body):
    return {k: v for k, v in body.items() if k not in ("seconds", "cached", "recording_id")}


def _programme(tone, rng):
    x = tone(44100, 4.0, freqs_hz=(997.0,), amplitude=0.5, channels=2)
    x[:, 1] += rng.standard_normal(x.shape[0]) * 0.05
    x[44100:44100 + 500, 0] = 1.0                        # a clipped stretch
    return x


def test_upload_with_columns_measures_and_draws_in_one_read(app, client, headers, audio_bytes,
                                                            tone, rng):
    data = audio_bytes(_programme(tone, rng), 44100, subtype="FLOAT")
    r = _post(client, headers, data, "take.wav", columns="640")
    assert r.status_code == 201
    rec = r.get_json()
    path = _stored(app, rec)
    reference = measure(path, media.probe(path))          # what an upload without columns does
    for key in ("integrated_lufs", "loudness_range_lu", "true_peak_dbtp", "sample_peak_dbfs"):
        assert rec[key] == reference[key], key
    assert rec["analysis"] == "done"
    # the page's overview request finds the upload's picture ready
    got = client.get(f"/api/recordings/{rec['id']}/overview?columns=640").get_json()
    assert got["cached"] is True and got["recording_id"] == rec["id"]
    assert _picture(got) == _picture(jsonable(overview(path, columns=640)))
    assert got["full_scale"]["total"] == 500 and got["columns"] == 640
    # any other width is drawn on request, as documented
    other = client.get(f"/api/recordings/{rec['id']}/overview?columns=500").get_json()
    assert other["cached"] is False and other["columns"] == 500
    assert _picture(other) == _picture(jsonable(overview(path, columns=500)))
    # without columns the upload only measures (the same figures)
    plain = _post(client, headers, data, "again.wav").get_json()
    assert plain["integrated_lufs"] == rec["integrated_lufs"]
    assert not client.get(f"/api/recordings/{plain['id']}/overview?columns=640").get_json()["cached"]


@pytest.mark.parametrize("columns", ["0", "4001", "wide", "12.5", ""])
def test_bad_overview_columns_refuse_the_upload_and_keep_nothing(app, client, headers,
                                                                 audio_bytes, tone, columns):
    r = _post(client, headers, audio_bytes(tone(44100, 0.5), 44100), "take.wav",
              columns=columns)
    assert r.status_code == 400
    err = r.get_json()["error"]
    assert err["field"] == "columns" and "1 to 4000" in err["message"]
    assert os.listdir(app.extensions["rateferry"].store.uploads) == []


def test_overview_of_a_long_upload_waits_for_its_background_analysis(make_app, audio_bytes,
                                                                      tone):
    app = make_app(ANALYSE_SYNC_MAX_S=0.5)
    client = app.test_client()
    headers = {"X-Rateferry-Token": app.config["PAGE_TOKEN"]}
    st = app.extensions["rateferry"]
    hold = threading.Event()
    st.background.submit(hold.wait, 60)       # the analysis waits in the queue behind this
    x = tone(8000, 3.0, freqs_hz=(997.0,), amplitude=0.5)
    rec = _post(client, headers, audio_bytes(x, 8000, subtype="FLOAT"), "long.wav",
                columns="300").get_json()
    assert rec["analysis"] == "pending"
    columns, future = st.analyses.running(rec["id"])
    assert columns == 300
    # another width does not wait: it reads the file itself
    other = client.get(f"/api/recordings/{rec['id']}/overview?columns=200")
    assert other.status_code == 200 and other.get_json()["columns"] == 200
    answers = []
    waiting = threading.Thread(target=lambda: answers.append(
        client.get(f"/api/recordings/{rec['id']}/overview?columns=300")))
    waiting.start()
    waiting.join(timeout=0.3)
    assert waiting.is_alive() and not answers   # waiting for the analysis, not reading
    hold.set()
    waiting.join(timeout=60)
    body = answers[0].get_json()
    assert answers[0].status_code == 200
    assert body["seconds"] == future.result()["seconds"]      # the analysis' own picture
    assert _picture(body) == _picture(jsonable(overview(_stored(app, rec), columns=300)))
    assert st.analyses.running(rec["id"]) is None
    done = client.get(f"/api/recordings/{rec['id']}").get_json()
    assert done["analysis"] == "done"
    # BS.1770-4: 20 log10(0.5) - 3.01 = -9.03 LKFS for the 997 Hz sine
    assert done["integrated_lufs"] == pytest.approx(-9.03, abs=0.05)
    assert np.isfinite(done["true_peak_dbtp"])
