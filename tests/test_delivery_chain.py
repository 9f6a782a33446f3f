"""The delivery chain end to end through real files: channel layout, loudness normalisation with
the look-ahead true-peak limiter, verification of the written file, MP3, carried RIFF chunks,
same-rate pass-through, and the command line's refusals and exit statuses.

Outside references, named beside each check:
* true peak measured independently: 16x oversampling with scipy.signal.resample_poly (the
  oversampling method of ITU-R BS.1770-4 Annex 2, with more phases than its example);
* integrated loudness by pyloudnorm (a general-purpose BS.1770 implementation) beside ours;
* EBU Tech 3285 (bext: TimeReference counts samples since midnight): 10:00:00:00 at 48 kHz is
  36000 s * 48000 = 1,728,000,000 samples and at 44.1 kHz 36000 * 44100 = 1,587,600,000;
* the mono fold-down laws are the usual pan laws (common practice), checked on analytic sines.
"""

import json
import math
import os

import numpy as np
import pyloudnorm
import pytest
import soundfile as sf
from scipy import signal

from webapp import riffchunks
from webapp.cli import main
from webapp.delivery import Delivery
from webapp.dsp.errors import ParameterError
from webapp.dsp.loudness import integrated_loudness
from webapp.jobs import EXIT_DELIVERY_NOT_MET, convert_file, prepare
from webapp.recipe import load_recipe


def reference_true_peak_db(y):
    """Independent true peak: 16x oversampling by scipy.signal.resample_poly."""
    y = np.asarray(y, dtype=np.float64)
    y = y[:, None] if y.ndim == 1 else y
    return 20 * math.log10(np.max(np.abs(signal.resample_poly(y, 16, 1, axis=0))))


def pyloudnorm_lufs(y, rate):
    return pyloudnorm.Meter(rate).integrated_loudness(np.asarray(y, dtype=np.float64))


def hard_material(rate, rng, seconds=6.0):
    """Square-ish bursts, a full-scale 19 kHz tone and clipped drum hits, one after another."""
    n = int(rate * seconds)
    t = np.arange(n) / rate
    part = n // 3
    x = np.zeros(n)
    # square-ish bursts: a 200 Hz square wave's first five odd harmonics, near full scale
    sq = sum(np.sin(2 * np.pi * 200 * k * t) / k for k in (1, 3, 5, 7, 9)) * 0.95
    gate = (np.sin(2 * np.pi * 2 * t) > 0).astype(float)
    x[:part] = (sq * gate)[:part]
    # a full-scale 19 kHz tone (inter-sample peaks at 44.1 and 48 kHz)
    x[part:2 * part] = np.sin(2 * np.pi * 19000 * t[part:2 * part] + 0.7)
    # clipped drums: decaying noise hits, driven into a hard clip
    hits = np.zeros(n - 2 * part)
    for start in range(0, hits.size, rate // 4):
        length = min(rate // 8, hits.size - start)
        hits[start:start + length] = rng.standard_normal(length) * np.exp(-np.arange(length) / (rate * 0.02)) * 3
    x[2 * part:] = np.clip(hits, -1.0, 1.0)
    return np.stack([x, 0.9 * x], axis=1)


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


# --------------------------------------------------------------------------------------------
# loudness normalisation with the limiter

def test_limiter_meets_the_target_under_the_ceiling_on_hard_material(tmp_audio, tmp_path, rng):
    src = tmp_audio("hard.wav", hard_material(48000, rng), 48000, subtype="FLOAT")
    out = tmp_path / "hard_44k1.wav"
    # the material measures -0.3 LUFS and +6.4 dBTP: -6 LUFS needs about 2 dB of limiting
    d = Delivery(bits="24", loudness_lufs=-6.0, loudness_tolerance_lu=0.5, ceiling_dbtp=-1.0,
                 limiter=True, max_limiting_db=12.0)
    r = convert_file(src, out, fs_out=44100, delivery=d)
    y, rate = sf.read(out)
    # the ceiling held, measured independently (16x resample_poly)
    assert reference_true_peak_db(y) <= -1.0
    # the target met within the tolerance (we aim at 0.1 LU), by our meter and by pyloudnorm
    assert abs(integrated_loudness(y, rate) - (-6.0)) <= 0.1
    assert abs(pyloudnorm_lufs(y, rate) - (-6.0)) <= 0.5
    report = r.delivery_report
    assert report["met"] is True and report["notes"] == []
    assert report["limiter"]["max_gain_reduction_db"] > 1.0    # the limiter did act
    assert 0 < report["limiter"]["limited_s"] < 6.0
    assert report["limiter"]["max_gain_reduction_db"] <= 12.0


def test_a_target_needing_more_limiting_than_allowed_is_not_met_and_the_file_is_kept(
        tmp_audio, tmp_path, rng, capsys):
    src = tmp_audio("hard.wav", hard_material(48000, rng), 48000, subtype="FLOAT")
    out = tmp_path / "hard_44k1.wav"
    code, _, err = _run(capsys, "convert", src, out, "--to", 44100, "--bits", 24, "--loudness",
                        -2, "--tolerance", 0.5, "--ceiling", -1, "--limiter", "--max-limiting", 2,
                        "--quiet")
    assert code == EXIT_DELIVERY_NOT_MET == 5
    assert "delivery target NOT met" in err and "more limiting than the 2 dB allowed" in err
    assert "the file was kept" in err
    y, rate = sf.read(out)
    assert reference_true_peak_db(y) <= -1.0                  # the ceiling still held
    assert integrated_loudness(y, rate) < -2.5                # and the target was not reached


def test_loudness_and_ceiling_without_the_limiter_report_the_miss(tmp_audio, tmp_path, rng,
                                                                   capsys):
    # the case of the issue: a target a ceiling keeps out of reach used to exit 0
    src = tmp_audio("hard.wav", hard_material(48000, rng), 48000, subtype="FLOAT")
    code, out, err = _run(capsys, "convert", src, tmp_path / "o.wav", "--to", 48000, "--loudness",
                          -4, "--ceiling", -1, "--json")
    assert code == 5
    figs = json.loads(out)
    assert figs["delivery"]["met"] is False
    assert any("allow the limiter" in n for n in figs["delivery"]["notes"])


def test_the_limiter_holds_a_ceiling_alone_without_changing_the_level(tmp_audio, tmp_path, rng):
    x = hard_material(48000, rng) * 0.9
    src = tmp_audio("hard.wav", x, 48000, subtype="FLOAT")
    r = convert_file(src, tmp_path / "o.wav", fs_out=48000,
                     delivery=Delivery(bits="32f", ceiling_dbtp=-3.0, limiter=True,
                                       max_limiting_db=10.0))
    y, _ = sf.read(tmp_path / "o.wav")
    assert r.gain_db == 0.0 and r.delivery_report["met"] is True
    assert reference_true_peak_db(y) <= -3.0
    # away from the peaks the samples pass unchanged (same rate: no filter)
    quiet = np.abs(x[:, 0]) < 0.05
    assert np.max(np.abs(y[quiet] - x[quiet])) < 0.05


# --------------------------------------------------------------------------------------------
# MP3 (and Vorbis): decoded and verified

def speechlike(rate, rng, seconds=5.0):
    """Noise shaped by a syllable-rate envelope with tonal bursts (our own test programme)."""
    n = int(rate * seconds)
    t = np.arange(n) / rate
    env = 0.5 * (1 + np.sin(2 * np.pi * 4 * t)) ** 2 / 4
    b, a = signal.butter(2, [200 / (rate / 2), 4000 / (rate / 2)], "band")
    voice = signal.lfilter(b, a, rng.standard_normal(n)) * env * 1.2
    voice += 0.3 * env * np.sin(2 * np.pi * 220 * t)
    return np.stack([voice, 0.8 * voice + 0.02 * rng.standard_normal(n)], axis=1)


def test_podcast_profile_writes_an_mp3_verified_after_decoding(tmp_audio, tmp_path, rng, capsys):
    x = speechlike(48000, rng)
    src = tmp_audio("talk.wav", x, 48000, subtype="PCM_24")
    out = tmp_path / "talk.mp3"
    code, stdout, err = _run(capsys, "convert", src, out, "--profile", "podcast_episode",
                             "--json")
    assert code == 0, err
    figs = json.loads(stdout)
    report = figs["delivery"]
    assert report["verified_on"] == "the decoded file" and report["mp3_kbps"] == 128
    assert report["write_passes"] >= 1
    y, rate = sf.read(out)
    assert rate == 44100 and sf.info(out).format == "MP3"
    # decoded true peak under the ceiling (independent 16x) and loudness within the profile's
    # +-1 LU of -16 LUFS (AES TD1004: -16 LUFS, at most -1 dBTP), by our meter and pyloudnorm
    assert reference_true_peak_db(y) <= -1.0
    assert abs(integrated_loudness(y, rate) - (-16.0)) <= 1.0
    assert abs(pyloudnorm_lufs(y, rate) - (-16.0)) <= 1.0
    # duration: the source's at the new rate, within the codec's padding (one MPEG-1 Layer III
    # frame holds 1152 samples; the encoder adds under two frames of delay and padding,
    # ISO/IEC 11172-3 frame size from memory)
    expected = math.ceil(x.shape[0] * 44100 / 48000)
    assert abs(y.shape[0] - expected) <= 2 * 1152


def test_codec_overshoot_is_corrected_by_another_pass(tmp_audio, tmp_path, rng):
    # speech limited hard against -0.3 dBTP: the MP3 encoding overshoots so thin a margin
    # (common practice: leave 1 dB or more for lossy codecs), so another pass lowers the
    # limiter's ceiling by the overshoot measured on the decoded file
    src = tmp_audio("talk.wav", speechlike(48000, rng), 48000, subtype="FLOAT")
    r = convert_file(src, tmp_path / "o.mp3", fs_out=48000,
                     delivery=Delivery(ceiling_dbtp=-0.3, limiter=True, max_limiting_db=20.0,
                                       loudness_lufs=-12.0, loudness_tolerance_lu=1.0,
                                       mp3_kbps=128))
    y, rate = sf.read(tmp_path / "o.mp3")
    report = r.delivery_report
    assert report["write_passes"] >= 2
    assert "lowered" in r.gain_reason and "overshoot" in r.gain_reason
    assert report["met"] is True
    assert report["decoded"]["true_peak_dbtp"] <= -0.3
    assert reference_true_peak_db(y) <= -0.3 + 0.05     # our meter and 16x resample_poly agree
    assert abs(pyloudnorm_lufs(y, rate) - (-12.0)) <= 1.0


def test_vorbis_is_verified_on_the_decoded_file(tmp_audio, tmp_path, rng):
    src = tmp_audio("talk.wav", speechlike(48000, rng, 3.0), 48000, subtype="PCM_16")
    r = convert_file(src, tmp_path / "o.ogg", fs_out=48000,
                     delivery=Delivery(loudness_lufs=-18.0, ceiling_dbtp=-1.0, limiter=True))
    y, rate = sf.read(tmp_path / "o.ogg")
    assert r.delivery_report["verified_on"] == "the decoded file"
    assert reference_true_peak_db(y) <= -1.0 + 0.05     # meter and reference agree within 0.05
    assert abs(integrated_loudness(y, rate) - (-18.0)) <= 0.5


# --------------------------------------------------------------------------------------------
# channel layout

def test_mono_fold_down_laws_on_analytic_sines(tmp_audio, tmp_path):
    rate = 48000
    t = np.arange(rate * 2) / rate
    s = 0.4 * np.sin(2 * np.pi * 500 * t)
    src = tmp_audio("centre.wav", np.stack([s, s], axis=1), rate, subtype="FLOAT")
    for law, gain in (("half", 1.0), ("equal_power", math.sqrt(2)), ("sum", 2.0)):
        out = tmp_path / f"{law}.wav"
        r = convert_file(src, out, fs_out=rate,
                         delivery=Delivery(bits="32f", channel_layout="mono", mono_law=law))
        y, _ = sf.read(out, always_2d=True)
        assert y.shape[1] == 1 and r.channels_out == 1
        # a centre-panned sine: half keeps its level, equal power +3.01 dB, sum +6.02 dB
        np.testing.assert_allclose(y[:, 0], gain * s, atol=1e-6)


def test_pick_delivers_one_channel_and_loudness_is_measured_on_it(tmp_audio, tmp_path):
    rate = 48000
    t = np.arange(rate * 2) / rate
    left, right = 0.1 * np.sin(2 * np.pi * 300 * t), 0.5 * np.sin(2 * np.pi * 1000 * t)
    src = tmp_audio("two.wav", np.stack([left, right], axis=1), rate, subtype="FLOAT")
    r = convert_file(src, tmp_path / "r.wav", fs_out=16000,
                     delivery=Delivery(bits="32f", channel_layout="pick", pick_channel=2))
    y, _ = sf.read(tmp_path / "r.wav", always_2d=True)
    assert y.shape[1] == 1
    ideal = 0.5 * np.sin(2 * np.pi * 1000 * np.arange(y.shape[0]) / 16000)
    mid = slice(2000, -2000)
    assert np.max(np.abs(y[mid, 0] - ideal[mid])) < 1e-3       # physics: the sine at 16 kHz
    assert r.output_meters["integrated_lufs"] == pytest.approx(integrated_loudness(y, 16000),
                                                               abs=1e-6)


def test_mono_to_stereo_and_a_pick_out_of_range(tmp_audio, tmp_path):
    src = tmp_audio("mono.wav", 0.3 * np.ones((4800, 1)), 48000, subtype="FLOAT")
    r = convert_file(src, tmp_path / "st.wav", fs_out=48000,
                     delivery=Delivery(bits="32f", channel_layout="stereo"))
    y, _ = sf.read(tmp_path / "st.wav")
    assert y.shape == (4800, 2) and np.array_equal(y[:, 0], y[:, 1]) and r.channels_out == 2
    with pytest.raises(ParameterError, match="pick_channel must be from 1 to 1"):
        prepare(src, tmp_path / "p.wav", fs_out=48000,
                delivery=Delivery(channel_layout="pick", pick_channel=2))


# --------------------------------------------------------------------------------------------
# same rate: no filter unless asked

def test_same_rate_passes_the_samples_through_unless_the_filter_is_asked_for(tmp_audio, tmp_path,
                                                                          rng, capsys):
    x = (0.5 * rng.uniform(-1, 1, (9600, 2))).astype(np.float32)
    src = tmp_audio("noise.wav", x, 48000, subtype="FLOAT")
    recipe = tmp_path / "r.json"
    code, out, err = _run(capsys, "convert", src, tmp_path / "same.wav", "--to", 48000,
                          "--bits", "32f", "--json", "--write-recipe", recipe)
    assert code == 0, err
    y, _ = sf.read(tmp_path / "same.wav", dtype="float32")
    assert np.array_equal(y, x)                      # bit for bit: no filter ran
    assert json.loads(out)["delivery"]["filter_applied"] is False
    assert load_recipe(recipe).filter_applied is False
    code, out, err = _run(capsys, "convert", src, tmp_path / "filtered.wav", "--to", 48000,
                          "--bits", "32f", "--filter-same-rate", "--json")
    assert code == 0, err
    z, _ = sf.read(tmp_path / "filtered.wav", dtype="float32")
    assert json.loads(out)["delivery"]["filter_applied"] is True and not np.array_equal(z, x)
    # a re-run of the unfiltered recipe is exact
    code, out, err = _run(capsys, "convert", src, tmp_path / "again.wav", "--recipe", recipe,
                          "--json")
    assert code == 0, err
    assert json.loads(out)["recipe"]["reproduces"] is True


# --------------------------------------------------------------------------------------------
# outputs are never replaced silently

def test_convert_refuses_an_existing_output_unless_told(tmp_audio, tmp_path, capsys):
    src = tmp_audio("a.wav", 0.1 * np.ones((4800, 1)), 48000, subtype="PCM_16")
    out = tmp_path / "out.wav"
    out.write_bytes(b"precious")
    code, _, err = _run(capsys, "convert", src, out, "--to", 44100, "--quiet")
    assert code == 2 and "already exists" in err and "--replace" in err
    assert out.read_bytes() == b"precious"
    code, _, err = _run(capsys, "convert", src, out, "--to", 44100, "--quiet", "--replace")
    assert code == 0, err
    assert sf.info(out).samplerate == 44100


# --------------------------------------------------------------------------------------------
# bext, iXML and cue points carried through `rateferry convert`

def _bwf_source(tmp_audio, rate=48000):
    x = 0.1 * np.sin(2 * np.pi * 1000 * np.arange(rate * 2) / rate)
    path = tmp_audio("take.wav", np.stack([x, x], axis=1), rate, subtype="PCM_24")
    stamp = 10 * 3600 * rate                       # 10:00:00:00 at 48 kHz (EBU Tech 3285)
    bext = riffchunks.Bext(description="scene 4 take 2", originator="field unit",
                           time_reference=stamp, version=1)
    ixml = (f"<BWFXML><SPEED><FILE_SAMPLE_RATE>{rate}</FILE_SAMPLE_RATE><TIMESTAMP_SAMPLE_RATE>"
            f"{rate}</TIMESTAMP_SAMPLE_RATE><TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>{stamp >> 32}"
            f"</TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI><TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>"
            f"{stamp & 0xFFFFFFFF}</TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO></SPEED></BWFXML>")
    cues = [riffchunks.CuePoint(1, 12345, label="clap"), riffchunks.CuePoint(2, 48000, label="line"),
            riffchunks.CuePoint(3, 90001, note="end", length=4801)]
    chunks = [(b"bext", riffchunks.bext_body(bext)), (b"iXML", ixml.encode())]
    chunks += riffchunks.cue_chunks(cues)
    os.replace(riffchunks.insert_chunks(path, chunks), path)
    return path, cues


def test_bext_ixml_and_cues_are_rescaled_through_the_command(tmp_audio, tmp_path, capsys):
    src, cues = _bwf_source(tmp_audio)
    out = tmp_path / "take_44k1.wav"
    code, _, err = _run(capsys, "convert", src, out, "--to", 44100, "--bits", 24, "--quiet")
    assert code == 0, err
    chunks = {ident: body for ident, body, _, _ in riffchunks.read_chunks(out) if body is not None}
    bext = riffchunks.parse_bext(chunks[b"bext"])
    assert bext.time_reference == 1_587_600_000         # 36000 s * 44100 (EBU Tech 3285)
    assert bext.description == "scene 4 take 2"
    text = chunks[b"iXML"].decode()
    assert "<FILE_SAMPLE_RATE>44100</FILE_SAMPLE_RATE>" in text
    assert "<TIMESTAMP_SAMPLE_RATE>44100</TIMESTAMP_SAMPLE_RATE>" in text
    lo = int(text.split("<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>")[1].split("<")[0])
    hi = int(text.split("<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>")[1].split("<")[0])
    assert (hi << 32) | lo == 1_587_600_000
    adtl = [body for ident, body, _, _ in riffchunks.read_chunks(out)
            if ident == b"LIST" and body[:4] == b"adtl"]
    got = riffchunks.parse_cues(chunks[b"cue "], adtl)
    assert [p.label for p in got] == ["clap", "line", ""] and got[2].note == "end"
    for before, after in zip(cues, got):
        # the same time within half an output sample
        assert abs(after.position / 44100 - before.position / 48000) <= 0.5 / 44100
    assert abs(got[2].length / 44100 - 4801 / 48000) <= 0.5 / 44100
    # the audio and the text tags are still read as before
    assert sf.info(out).samplerate == 44100 and sf.info(out).frames == math.ceil(96000 * 147 / 160)


def test_chunks_are_not_carried_into_flac_and_the_user_is_told(tmp_audio, tmp_path, capsys):
    src, _ = _bwf_source(tmp_audio)
    code, _, err = _run(capsys, "convert", src, tmp_path / "take.flac", "--to", 44100, "--quiet")
    assert code == 0
    assert "bext, cue, iXML chunks are not carried into a FLAC output" in err


# --------------------------------------------------------------------------------------------
# profiles on the command line; recipes of the new fields re-run exactly

def test_profile_fields_are_overridden_by_the_options(tmp_audio, tmp_path, rng, capsys):
    src = tmp_audio("talk.wav", speechlike(48000, rng, 3.0), 48000, subtype="PCM_24")
    code, out, err = _run(capsys, "convert", src, tmp_path / "t.wav", "--profile",
                          "speech_service_16k", "--json")
    assert code == 0, err
    figs = json.loads(out)
    assert (figs["output"]["rate_hz"], figs["output"]["channels"], figs["delivery"]["bits"]) == (
        16000, 1, "16")
    assert figs["delivery"]["channel_layout"] == "mono" and figs["delivery"]["ceiling_dbtp"] == -1
    code, out, err = _run(capsys, "convert", src, tmp_path / "u.wav", "--profile",
                          "speech_service_16k", "--to", 24000, "--channels", "pick", "--pick", 2,
                          "--ceiling", -3, "--json")
    assert code == 0, err
    figs = json.loads(out)
    assert (figs["output"]["rate_hz"], figs["output"]["channels"],
            figs["delivery"]["pick_channel"]) == (24000, 1, 2)
    assert figs["delivery"]["ceiling_dbtp"] == -3


def test_a_limited_mono_delivery_re_runs_from_its_recipe_bit_for_bit(tmp_audio, tmp_path, rng,
                                                                   capsys):
    src = tmp_audio("hard.wav", hard_material(44100, rng, 3.0), 44100, subtype="FLOAT")
    recipe = tmp_path / "r.json"
    code, _, err = _run(capsys, "convert", src, tmp_path / "a.wav", "--to", 48000, "--bits", 16,
                        "--dither", "shaped", "--channels", "mono", "--loudness", -14,
                        "--ceiling", -1, "--limiter", "--max-limiting", 12, "--quiet",
                        "--write-recipe", recipe)
    assert code == 0, err
    data = json.load(open(recipe))
    assert data["version"] == 2 and data["delivery"]["limiter"] is True
    assert data["output"]["channels"] == 1
    code, out, err = _run(capsys, "convert", src, tmp_path / "b.wav", "--recipe", recipe,
                          "--json")
    assert code == 0, err
    assert json.loads(out)["recipe"]["reproduces"] is True
    assert (tmp_path / "a.wav").read_bytes() == (tmp_path / "b.wav").read_bytes()
