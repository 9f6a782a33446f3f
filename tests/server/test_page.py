"""The page blueprint, health, options, static files and the demo recording."""

import json
import os
import re

import numpy as np
import plotly
import soundfile as sf

from webapp import __version__
from webapp.dsp.spec import PRESETS


def _config(client):
    html = client.get("/").get_data(as_text=True)
    m = re.search(r'<script id="rateferry-config" type="application/json">(.*?)</script>', html,
                  re.S)
    assert m, "the page has no config element"
    return html, json.loads(m.group(1))


def test_health_reports_ok_and_the_version(client):
    r = client.get("/api/health")
    assert r.status_code == 200
    assert r.get_json() == {"status": "ok", "version": __version__}


def test_page_holds_config_with_token_urls_and_loads_main_module(client, app):
    html, config = _config(client)
    assert config["token"] == app.config["PAGE_TOKEN"]
    assert config["demo_recording_id"] is None  # LOAD_DEMO is off in these tests
    assert config["urls"]["designs"] == "/api/designs"
    assert config["urls"]["conversion"] == "/api/conversions/{id}"
    assert config["urls"]["plotly"] == "/static/vendor/plotly.min.js"
    assert '<script type="module" src="/static/js/main.js"></script>' in html
    # every URL template without a placeholder answers (no dead links in the config)
    for name, url in config["urls"].items():
        if "{" not in url and name not in ("clear",):
            r = client.get(url)
            assert r.status_code in (200, 405), (name, url, r.status_code)


def test_plotly_is_served_from_the_installed_package(client):
    path = os.path.join(os.path.dirname(plotly.__file__), "package_data", "plotly.min.js")
    r = client.get("/static/vendor/plotly.min.js")
    assert r.status_code == 200
    assert r.mimetype == "text/javascript"
    with open(path, "rb") as f:
        assert r.data == f.read()


def test_static_folder_is_served_at_static(make_app, tmp_path):
    static = tmp_path / "static"
    (static / "js").mkdir(parents=True)
    (static / "js" / "main.js").write_text("export const answer = 42;\n")
    c = make_app(STATIC_FOLDER=str(static)).test_client()
    r = c.get("/static/js/main.js")
    assert r.status_code == 200
    assert r.data == b"export const answer = 42;\n"
    assert c.get("/static/vendor/plotly.min.js").status_code == 200


def test_options_list_presets_and_limits(client, app):
    body = client.get("/api/options").get_json()
    assert set(body["presets"]) == set(PRESETS)
    for name, p in PRESETS.items():
        assert body["presets"][name]["spec"] == p["spec"].to_dict()
    assert 44100 in body["common_rates_hz"] and 192000 in body["common_rates_hz"]
    assert body["max_upload_bytes"] == app.config["MAX_CONTENT_LENGTH"]
    assert body["spec_fields"]["phase"]["choices"] == ["linear", "minimum"]


def test_default_upload_limit_fits_a_two_hour_stereo_24_bit_wav(app):
    # 2 h x 48000 frames/s x 2 channels x 3 bytes = 2073600000 bytes of audio, plus header
    audio_bytes = 2 * 3600 * 48000 * 2 * 3
    assert app.config["MAX_CONTENT_LENGTH"] == 2**31
    assert app.config["MAX_CONTENT_LENGTH"] > audio_bytes + 1_000_000


def test_unknown_route_and_wrong_method_answer_json(client, headers):
    r = client.get("/api/nothing-here")
    assert r.status_code == 404
    assert "error" in r.get_json()
    r = client.put("/api/health", headers=headers)
    assert r.status_code == 405
    assert r.get_json()["error"]["message"]


def test_catch_all_handler_answers_500_json_without_a_traceback(make_app):
    app = make_app()

    @app.get("/api/_test_bug")
    def _bug():
        raise RuntimeError("secret detail /home/user/file.py line 12")

    r = app.test_client().get("/api/_test_bug")
    assert r.status_code == 500
    text = r.get_data(as_text=True)
    assert "Traceback" not in text and "secret detail" not in text
    assert r.get_json()["error"]["message"].startswith("internal error")
    app.config["_statuses"].clear()  # this one 500 is the point of the test


# ---------------------------------------------------------------------------------------------
# the demo recording

def _demo_folder(tmp_path, names):
    folder = tmp_path / "demo"
    folder.mkdir()
    t = np.arange(44100) / 44100
    for name in names:
        sf.write(folder / name, 0.2 * np.sin(2 * np.pi * 440 * t), 44100,
                 subtype="PCM_16")
    return folder


def test_demo_recording_is_registered_in_place_and_keeps_its_id(make_app, tmp_path):
    folder = _demo_folder(tmp_path, ["other.wav", "harbour_interview_44k1.flac"])
    app = make_app(LOAD_DEMO=True, DEMO_MEDIA=str(folder))
    c = app.test_client()
    _, config = _config(c)
    demo_id = config["demo_recording_id"]
    rec = c.get(f"/api/recordings/{demo_id}").get_json()
    assert rec["demo"] is True
    assert rec["name"] == "harbour_interview_44k1.flac"
    assert rec["rate_hz"] == 44100 and rec["frames"] == 44100
    # not copied into the instance folder
    assert os.listdir(app.extensions["rateferry"].store.uploads) == []
    again = make_app(LOAD_DEMO=True, DEMO_MEDIA=str(folder))
    assert again.extensions["rateferry"].demo_id == demo_id


def test_demo_falls_back_to_any_wav_or_flac(make_app, tmp_path):
    folder = _demo_folder(tmp_path, ["b_take.wav"])
    app = make_app(LOAD_DEMO=True, DEMO_MEDIA=str(folder))
    rec = app.test_client().get(
        f"/api/recordings/{app.extensions['rateferry'].demo_id}").get_json()
    assert rec["name"] == "b_take.wav"


def test_missing_demo_folder_leaves_no_demo(make_app, tmp_path):
    app = make_app(LOAD_DEMO=True, DEMO_MEDIA=str(tmp_path / "absent"))
    assert app.extensions["rateferry"].demo_id is None
