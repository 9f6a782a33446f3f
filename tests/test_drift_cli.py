"""`rateferry drift` and `rateferry convert --speed / --true-rate`: the JSON contract, the sign
conventions, the corrected tracks and their recipes, through real files.

Outside references:
* the pairs are made by scipy.signal.resample_poly (the reference resampler) with exact rational
  ratios: 40001/40000 is +25 ppm, 39999/40000 is -25 ppm (a track whose clock runs fast takes
  more samples per true second: t_track = (1 + e) t_ref);
* the start offset is a whole number of samples of silence-free other content put in front
  (physics: the content then comes that much later in the file);
* speed changes: a sine at f comes out at f * p/q (physics: played p/q times as fast), measured
  by a least-squares sine fit; the length is ceil(frames * q / p) (the rational conversion
  definition at an unchanged rate).
"""

import json
import math
import os

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from webapp.cli import main

FS = 16000


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def _pair(talk, rng, seconds, up, down, late_s):
    """(reference, track): two voices, each louder on its own recorder; the track made by
    resample_poly(up, down) with ``late_s`` of other content in front, another level, its own
    noise and a low-pass filter."""
    n = int(seconds * FS)
    a, b = talk(rng, n + 4 * FS, FS), talk(rng, n + 4 * FS, FS)
    ref = 0.2 * (a + 0.3 * b) + 0.002 * rng.standard_normal(a.size)
    trk = signal.resample_poly(0.3 * a + b, up, down)
    sos = signal.butter(4, 5000, fs=FS, output="sos")
    trk = 0.15 * signal.sosfilt(sos, trk) + 0.003 * rng.standard_normal(trk.size)
    head = 0.05 * rng.standard_normal(int(round(late_s * FS)))
    return ref[:n], np.concatenate([head, trk])[:n + int(late_s * FS)]


@pytest.fixture(scope="module")
def pairs(tmp_path_factory, speech_bursts):
    """Two pairs on disk: +25 ppm starting 0.3 s late, -25 ppm starting 0.25 s early."""
    folder = tmp_path_factory.mktemp("pairs")
    rng = np.random.default_rng(20261201)
    ref, fast = _pair(speech_bursts, rng, 75, 40001, 40000, 0.3)
    paths = dict(ref=folder / "host.wav", fast=folder / "guest_fast.wav",
                 early=folder / "guest_early.wav")
    sf.write(paths["ref"], ref, FS, subtype="PCM_24")
    sf.write(paths["fast"], fast, FS, subtype="PCM_24")
    # the early track: the same reference content, cut 0.25 s into its (slow) clock
    ref2, slow = _pair(speech_bursts, np.random.default_rng(7), 75, 39999, 40000, 0.0)
    paths["ref2"] = folder / "host2.wav"
    sf.write(paths["ref2"], ref2, FS, subtype="PCM_24")
    sf.write(paths["early"], slow[int(0.25 * FS):], FS, subtype="PCM_24")
    return paths


def test_drift_json_gives_the_contract_keys_and_positive_signs_for_fast_and_late(capsys,
                                                                                 pairs):
    code, out, err = run(capsys, "drift", str(pairs["ref"]), str(pairs["fast"]), "--json")
    assert code == 0, err
    body = json.loads(out)
    assert body["reference"] == "host.wav"
    (t,) = body["tracks"]
    for key in ("drift_ppm", "offset_ms", "drift_ppm_low", "drift_ppm_high", "interval_ppm",
                "confidence", "residual_rms_ms", "residual_worst_ms", "used_share",
                "windows_used", "windows_total", "points"):
        assert key in t
    for key in ("times_s", "offsets_ms", "used", "fitted_ms", "residual_ms", "peak_ratio_db"):
        assert len(t["points"][key]) == t["windows_total"]
    # resample_poly 40001/40000: +25 ppm; 0.3 s of other content in front: +300 ms
    assert t["drift_ppm"] == pytest.approx(25.0, abs=0.5)
    assert t["offset_ms"] == pytest.approx(300.0, abs=0.1)
    assert t["drift_ppm_low"] <= t["drift_ppm"] <= t["drift_ppm_high"]
    assert 0.5 < t["used_share"] <= 1.0


def test_drift_signs_are_negative_for_a_slow_track_that_starts_early(capsys, pairs):
    code, out, err = run(capsys, "drift", str(pairs["ref2"]), str(pairs["early"]), "--json")
    assert code == 0, err
    t = json.loads(out)["tracks"][0]
    # resample_poly 39999/40000: -25 ppm; 0.25 s cut from the head: -250 ms
    assert t["drift_ppm"] == pytest.approx(-25.0, abs=0.5)
    assert t["offset_ms"] == pytest.approx(-250.0, abs=0.1)


def test_drift_help_states_the_sign_conventions(capsys):
    code, out, _ = run(capsys, "drift", "--help")
    assert code == 0
    text = " ".join(out.split())
    assert "positive when the track runs fast" in text
    assert "positive when the track starts late" in text


def test_drift_refuses_recordings_that_share_nothing_in_one_line(capsys, tmp_path, rng):
    a = tmp_path / "a.wav"
    b = tmp_path / "b.wav"
    sf.write(a, 0.1 * rng.standard_normal(40 * FS), FS)
    sf.write(b, 0.1 * rng.standard_normal(40 * FS), FS)
    code, out, err = run(capsys, "drift", str(a), str(b), "--json")
    assert code == 2 and out == ""
    assert err.startswith("rateferry: error: the recordings share too little to measure")
    assert err.count("\n") == 1


def test_drift_out_writes_corrected_tracks_that_remeasure_within_a_tenth_of_a_ms(
        capsys, pairs, tmp_path):
    code, out, err = run(capsys, "drift", str(pairs["ref"]), str(pairs["fast"]), "--out",
                         str(tmp_path), "--json", "--bits", "24")
    assert code == 0, err
    t = json.loads(out)["tracks"][0]
    corrected = t["corrected"]["path"]
    assert os.path.basename(corrected) == "guest_fast_aligned_16k_24bit.wav"
    info = sf.info(corrected)
    ref_info = sf.info(pairs["ref"])
    # at the reference's rate and length
    assert (info.samplerate, info.frames) == (FS, ref_info.frames)
    v = t["verification"]
    assert abs(v["offset_ms"]) < 0.1 and abs(v["offset_end_ms"]) < 0.1
    assert v["worst_offset_ms"] < 0.1
    assert abs(v["drift_ppm"]) < 0.5
    assert os.path.isfile(t["corrected"]["recipe"])

    # never replaces a file unasked: a second run is refused and the file is untouched
    before = os.path.getmtime(corrected)
    code, out, err = run(capsys, "drift", str(pairs["ref"]), str(pairs["fast"]), "--out",
                         str(tmp_path), "--bits", "24")
    assert code == 2 and "--replace" in err
    assert os.path.getmtime(corrected) == before

    # the recipe re-runs bit-exact through convert --recipe (same sha256, same time base)
    again = tmp_path / "again.wav"
    code, out, err = run(capsys, "convert", str(pairs["fast"]), str(again), "--recipe",
                         t["corrected"]["recipe"], "--json", "--quiet")
    assert code == 0, err
    figs = json.loads(out)
    assert figs["recipe"]["reproduces"] is True
    assert figs["output"]["sha256"] == t["corrected"]["output_sha256"]
    assert figs["time_base"] == t["corrected"]["time_base"]


def test_a_recipe_whose_time_base_was_edited_does_not_reproduce(capsys, pairs, tmp_path):
    code, out, err = run(capsys, "drift", str(pairs["ref"]), str(pairs["fast"]), "--out",
                         str(tmp_path), "--json")
    assert code == 0, err
    recipe_path = json.loads(out)["tracks"][0]["corrected"]["recipe"]
    with open(recipe_path) as f:
        recipe = json.load(f)
    recipe["time_base"]["drift_ppm"] += 1.0
    edited = tmp_path / "edited.recipe.json"
    edited.write_text(json.dumps(recipe))
    code, out, err = run(capsys, "convert", str(pairs["fast"]), str(tmp_path / "x.wav"),
                         "--recipe", str(edited), "--quiet")
    assert code == 3 and "output.sha256" in err


def _sine_fit_hz(x, fs, guess_hz):
    """Frequency of the best least-squares sine near ``guess_hz`` (golden-section search)."""
    t = np.arange(x.size) / fs

    def resid(f):
        m = np.column_stack([np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t)])
        coef, *_ = np.linalg.lstsq(m, x, rcond=None)
        return float(np.sum((x - m @ coef) ** 2))

    lo, hi = guess_hz - 2.0, guess_hz + 2.0
    g = (math.sqrt(5) - 1) / 2
    for _ in range(60):
        a, b = hi - g * (hi - lo), lo + g * (hi - lo)
        if resid(a) < resid(b):
            hi = b
        else:
            lo = a
    return (lo + hi) / 2


def test_convert_speed_pull_down_gives_the_exact_length_and_the_slower_tone(capsys, tmp_path):
    fs, f = 48000, 1000.0
    frames = 48000 * 2 + 17
    x = 0.5 * np.sin(2 * np.pi * f * np.arange(frames) / fs)
    src = tmp_path / "tone.wav"
    sf.write(src, x, fs, subtype="FLOAT")
    out = tmp_path / "slow.wav"
    code, text, err = run(capsys, "convert", str(src), str(out), "--speed", "1000/1001",
                          "--json", "--quiet")
    assert code == 0, err
    y, rate = sf.read(out)
    assert rate == fs
    # length ceil(frames * 1001 / 1000) at the same rate (rational conversion definition)
    assert y.size == -(-frames * 1001 // 1000)
    # physics: played 1000/1001 times as fast, the tone sits at f * 1000/1001
    mid = y[fs // 2: fs // 2 + fs]
    assert _sine_fit_hz(mid, fs, f * 1000 / 1001) == pytest.approx(f * 1000 / 1001, abs=1e-3)
    body = json.loads(text)
    assert (body["speed"]["speed_num"], body["speed"]["speed_den"]) == (1000, 1001)


def test_convert_true_rate_takes_a_mislabelled_file_at_its_real_rate(capsys, tmp_path):
    # recorded at 44100 Hz but labelled 48000 Hz: a 441 Hz tone reads as 480 Hz
    header, true, f = 48000, 44100, 441.0
    x = 0.5 * np.sin(2 * np.pi * f * np.arange(true * 2) / true)
    src = tmp_path / "mislabelled.wav"
    sf.write(src, x, header, subtype="FLOAT")
    out = tmp_path / "fixed.wav"
    code, text, err = run(capsys, "convert", str(src), str(out), "--true-rate", str(true),
                          "--to", "48000", "--quiet")
    assert code == 0, err
    y, rate = sf.read(out)
    assert rate == 48000
    # physics: taken at its true rate the tone is 441 Hz again, two seconds long
    assert y.size == 96000
    assert _sine_fit_hz(y[12000:60000], rate, f) == pytest.approx(f, abs=1e-3)


def test_convert_refuses_speed_and_true_rate_together(capsys, tmp_path, rng):
    src = tmp_path / "a.wav"
    sf.write(src, 0.1 * rng.standard_normal(4800), 48000)
    code, out, err = run(capsys, "convert", str(src), str(tmp_path / "b.wav"), "--speed",
                         "25/24", "--true-rate", "44100")
    assert code == 2 and "one of time_base, speed and true_rate_hz" in err
    assert not (tmp_path / "b.wav").exists()
