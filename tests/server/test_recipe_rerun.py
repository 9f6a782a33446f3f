"""A recipe re-run through the API is the same job as `rateferry convert --recipe`: the
recipe's block size and output format, the source checked first, every figure compared.

Outside reference: the same bytes have the same sha256 (FIPS 180-4, via hashlib).
"""

import hashlib
import json

import soundfile as sf

from webapp.cli import main


def _sha(data):
    return hashlib.sha256(data).hexdigest()


def test_a_recipe_with_its_own_block_size_reruns_through_the_api_byte_for_byte(
        client, headers, recording, wait_done, tmp_path, tone, capsys):
    # the CLI converts a file with a non-default block size and writes its recipe
    x = tone(44100, 1.5, freqs_hz=(440.0, 5000.0), channels=2)
    src = tmp_path / "take.wav"
    sf.write(src, x, 44100, subtype="PCM_24")
    out, recipe_path = tmp_path / "take_48k.flac", tmp_path / "take_48k.recipe.json"
    assert main(["convert", str(src), str(out), "--to", "48000", "--preset", "quick_preview",
                 "--bits", "16", "--seed", "9", "--block-frames", "2999",
                 "--write-recipe", str(recipe_path), "--quiet"]) == 0
    capsys.readouterr()
    recipe = json.loads(recipe_path.read_text())
    assert recipe["block_frames"] == 2999

    # the same source uploaded to the page, re-run from the recipe
    rec = recording(data=x, rate_hz=44100, name="take.wav")
    r = client.post("/api/conversions", json={"recording_id": rec["id"], "recipe": recipe},
                    headers=headers)
    assert r.status_code == 202, r.get_json()
    done = wait_done(r.get_json()["id"])
    assert done["status"] == "done", done
    check = done["figures"]["recipe_check"]
    assert check == {"reproduces": True, "differences": []}
    body = client.get(done["urls"]["download"]).data
    assert _sha(body) == _sha(out.read_bytes()) == recipe["output"]["sha256"]


def test_a_recipe_rerun_on_another_recording_is_refused_before_any_work(
        client, headers, recording, tmp_path, tone, capsys):
    x = tone(44100, 1.0)
    src = tmp_path / "a.wav"
    sf.write(src, x, 44100, subtype="PCM_24")
    rp = tmp_path / "a.recipe.json"
    assert main(["convert", str(src), str(tmp_path / "a_48k.wav"), "--to", "48000",
                 "--preset", "quick_preview", "--write-recipe", str(rp), "--quiet"]) == 0
    capsys.readouterr()
    other = recording(rate_hz=44100, seconds=1.0, freqs_hz=(1234.0,), name="b.wav")
    r = client.post("/api/conversions", json={"recording_id": other["id"],
                                              "recipe": json.loads(rp.read_text())},
                    headers=headers)
    assert r.status_code == 400
    err = r.get_json()["error"]
    assert err["field"] == "source" and "a different file" in err["message"]
    assert client.get("/api/conversions").get_json()["conversions"] == []
