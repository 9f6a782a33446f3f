"""The whole conversion pipeline through real files (soundfile), and the convert command.

Outside references: output length ceil(frames * up / down) (definition of rational conversion);
an analytic sine sampled at the new rate (physics); ITU-R BS.1770-4 loudness and true peak as
measured by our meters, which tests/dsp/test_loudness.py checks against the standard and
pyloudnorm; the ceiling of -1 dBTP for spoken word is common practice.
"""

import json
import math
import os
import threading

import numpy as np
from scipy import signal
import pytest
import soundfile as sf

from webapp import pipeline
from webapp.cli import main
from webapp.dsp.dither import Quantizer
from webapp.dsp.errors import AudioFileError
from webapp.dsp.loudness import integrated_loudness
from webapp.dsp.truepeak import true_peak
from webapp.dsp.spec import Spec, preset
from webapp.delivery import Delivery
from webapp.jobs import convert_file, output_name
from webapp.pipeline import Cancelled


def sine(freq, rate, seconds, amp=0.5, channels=2):
    t = np.arange(int(rate * seconds)) / rate
    x = amp * np.sin(2 * np.pi * freq * t + 0.2)
    return np.repeat(x[:, None], channels, axis=1)


def test_float_wav_stays_float_and_matches_the_analytic_sine(tmp_audio, tmp_path):
    src = tmp_audio("tone.wav", sine(1000.0, 44100, 1.0), 44100, subtype="FLOAT")
    out = tmp_path / "tone_48k.wav"
    r = convert_file(src, out, spec=preset("music_delivery"), fs_out=48000)
    info = sf.info(out)
    assert info.subtype == "FLOAT" and info.samplerate == 48000
    assert info.frames == r.frames_out == math.ceil(44100 * 160 / 147)
    y, _ = sf.read(out)
    ideal = sine(1000.0, 48000, y.shape[0] / 48000)[: y.shape[0]]
    mid = slice(y.shape[0] // 4, 3 * y.shape[0] // 4)
    # ripple 0.01 dB on amplitude 0.5, plus float32 storage
    assert np.max(np.abs(y[mid] - ideal[mid])) <= 0.5 * (10 ** (0.01 / 20) - 1) + 1e-6
    assert r.delivery.dither == "none"


def test_16_bit_tpdf_output_is_bit_exact_on_a_re_run(tmp_audio, tmp_path):
    src = tmp_audio("tone.flac", sine(440.0, 48000, 0.5), 48000, subtype="PCM_16")
    a, b = tmp_path / "a.flac", tmp_path / "b.flac"
    d = Delivery(bits="16", dither="tpdf", dither_seed=7)
    ra = convert_file(src, a, spec=Spec(attenuation_db=100.0), fs_out=44100, delivery=d)
    rb = convert_file(src, b, spec=Spec(attenuation_db=100.0), fs_out=44100, delivery=d)
    assert ra.output_sha256 == rb.output_sha256
    ya, _ = sf.read(a, dtype="int16")
    yb, _ = sf.read(b, dtype="int16")
    assert np.array_equal(ya, yb)
    rc = convert_file(src, tmp_path / "c.flac", spec=Spec(attenuation_db=100.0), fs_out=44100,
                      delivery=Delivery(bits="16", dither="tpdf", dither_seed=8))
    assert rc.output_sha256 != ra.output_sha256


def test_ceiling_keeps_the_output_true_peak_under_it(tmp_audio, tmp_path):
    # A full-scale sine at fs/4 with a 45 degree phase: samples at -3.01 dBFS, true peak 0 dBTP;
    # a square-ish wave overshoots after band-limiting (Gibbs), so the output would clip.
    rate = 44100
    t = np.arange(rate) / rate
    x = np.clip(1.6 * np.sin(2 * np.pi * 1000 * t), -0.999, 0.999)
    src = tmp_audio("hot.wav", np.stack([x, x], axis=1), rate, subtype="FLOAT")
    r = convert_file(src, tmp_path / "out.wav", fs_out=48000,
                     delivery=Delivery(bits="16", dither="tpdf", ceiling_dbtp=-1.0))
    assert r.gain_db < 0 and r.gain_reason == "true-peak ceiling"
    assert r.output_meters["true_peak_dbtp"] <= -1.0
    y, fs = sf.read(tmp_path / "out.wav")
    assert true_peak(y, fs) <= -1.0
    assert r.clipped_samples == 0


def test_clipping_is_counted_when_no_ceiling_is_set(tmp_audio, tmp_path):
    rate = 44100
    t = np.arange(rate) / rate
    x = np.clip(1.6 * np.sin(2 * np.pi * 1000 * t), -0.999, 0.999)
    src = tmp_audio("hot.wav", x[:, None], rate, subtype="FLOAT")
    r = convert_file(src, tmp_path / "o.wav", fs_out=48000,
                     delivery=Delivery(bits="16", dither="none"))
    # direct count: the float conversion's samples whose 16-bit code leaves the word's range
    convert_file(src, tmp_path / "f.wav", fs_out=48000, delivery=Delivery(bits="64f"))
    yf, _ = sf.read(tmp_path / "f.wav")
    codes = np.rint(yf * 32768.0)
    expected = int(np.sum((codes > 32767) | (codes < -32768)))
    assert expected > 0
    assert r.clipped_samples == expected
    assert r.output_meters["true_peak_dbtp"] is not None


def test_loudness_target_and_ceiling_report_which_bound_won(tmp_audio, tmp_path):
    src = tmp_audio("speech.wav", sine(500.0, 48000, 3.0, amp=0.05), 48000, subtype="PCM_24")
    r = convert_file(src, tmp_path / "o.wav", fs_out=16000,
                     delivery=Delivery(bits="24", loudness_lufs=-16.0, ceiling_dbtp=-1.0))
    assert "loudness target won" in r.gain_reason
    assert r.output_meters["integrated_lufs"] == pytest.approx(-16.0, abs=0.05)
    # a hot target the ceiling must stop
    r2 = convert_file(src, tmp_path / "o2.wav", fs_out=16000,
                      delivery=Delivery(bits="24", loudness_lufs=-1.0, ceiling_dbtp=-1.0))
    assert "true-peak ceiling won" in r2.gain_reason
    assert r2.output_meters["true_peak_dbtp"] <= -1.0
    y, fs = sf.read(tmp_path / "o2.wav")
    assert integrated_loudness(y, fs) == pytest.approx(r2.output_meters["integrated_lufs"], abs=0.01)


def test_pipeline_output_does_not_depend_on_the_block_size(tmp_audio, tmp_path):
    src = tmp_audio("n.wav", 0.3 * np.random.default_rng(3).standard_normal((20000, 2)), 44100,
                    subtype="DOUBLE")
    outs = []
    for bs in (1000, 4096, 65536):
        p = tmp_path / f"o{bs}.wav"
        convert_file(src, p, spec=Spec(attenuation_db=100.0), fs_out=48000, block_frames=bs,
                     delivery=Delivery(bits="64f"))
        outs.append(sf.read(p)[0])
    assert max(np.max(np.abs(o - outs[0])) for o in outs) <= 1e-12


def test_shaped_dither_in_batches_gives_the_quantizers_codes_for_the_whole_signal(tmp_audio, tmp_path):
    # the pipeline gathers blocks into the shaped quantiser's large batches (two here, the
    # second partial, then the rest at the end): the codes must be those of one quantiser fed
    # the whole converted signal (the float64 output of the same conversion) at once
    rng = np.random.default_rng(12)
    x = 0.2 * rng.standard_normal((int(1.3 * 524288 * 44100 / 48000), 2))
    x[100000:130000] = 0.0                                      # digital silence too
    src = tmp_audio("n.wav", x, 44100, subtype="DOUBLE")
    spec = Spec(attenuation_db=100.0)
    convert_file(src, tmp_path / "f.wav", spec=spec, fs_out=48000, delivery=Delivery(bits="64f"))
    convert_file(src, tmp_path / "s.wav", spec=spec, fs_out=48000,
                 delivery=Delivery(bits="16", dither="shaped", dither_seed=5))
    converted, _ = sf.read(tmp_path / "f.wav")
    shaped, _ = sf.read(tmp_path / "s.wav", dtype="int16")
    assert converted.shape[0] > Quantizer(bits="16", dither="shaped", channels=2,
                                          rate_hz=48000).preferred_frames
    whole = Quantizer(bits="16", dither="shaped", seed=5, channels=2, rate_hz=48000).process(converted)
    np.testing.assert_array_equal(shaped, whole)


def test_cancel_leaves_no_output_and_no_temporary_file(tmp_audio, tmp_path):
    src = tmp_audio("long.wav", sine(300.0, 44100, 3.0), 44100, subtype="PCM_16")
    stop = threading.Event()

    def progress(fraction, done, total):
        if fraction > 0.3:
            stop.set()

    with pytest.raises(Cancelled):
        convert_file(src, tmp_path / "out.wav", fs_out=48000, block_frames=4096, progress=progress,
                     cancel=stop)
    assert sorted(os.listdir(tmp_path)) == ["long.wav"]


def test_nan_source_is_refused_and_nothing_written(tmp_audio, tmp_path):
    x = sine(300.0, 44100, 0.5)
    x[1234, 1] = np.nan
    src = tmp_audio("nan.wav", x, 44100, subtype="FLOAT")
    with pytest.raises(AudioFileError, match="1234"):
        convert_file(src, tmp_path / "out.wav", fs_out=48000)
    assert not (tmp_path / "out.wav").exists()
    assert [p for p in os.listdir(tmp_path) if "partial" in p] == []


def test_output_names_say_rate_and_word_length():
    assert output_name("interview", 48000, "16", ".flac") == "interview_48k_16bit.flac"
    assert output_name("interview", 44100, "24", ".wav") == "interview_44k1_24bit.wav"
    assert output_name("bed", 22050, None, ".ogg") == "bed_22k05.ogg"


# ------------------------------------------------------------------ the convert command

def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_convert_json_reports_source_and_output_meters(capsys, tmp_audio, tmp_path):
    src = tmp_audio("in.flac", sine(1000.0, 44100, 1.0, amp=0.4), 44100, subtype="PCM_16")
    out = tmp_path / "out.flac"
    code, text, err = run(capsys, "convert", src, out, "--to", 48000, "--bits", 16,
                          "--ceiling", -1, "--json")
    assert code == 0, err
    d = json.loads(text)
    for side in ("source", "output"):
        for key in ("integrated_lufs", "true_peak_dbtp", "sample_peak_dbfs"):
            assert isinstance(d[side][key], float)
    assert d["output"]["clipped_samples"] == 0
    assert d["source"]["frames"] == 44100 and d["output"]["frames"] == math.ceil(44100 * 160 / 147)
    assert "gain_db" in d["delivery"] and "seconds" in d["timing"] and d["design"]["up"] == 160
    # a 1 kHz sine at amplitude 0.4 reads -3.01 + 20 log10(0.4) + 3.01 (two channels) LUFS
    # (BS.1770-4: a 0 dBFS sine in one channel reads -3.01 LKFS; channels sum in power)
    assert d["source"]["integrated_lufs"] == pytest.approx(20 * math.log10(0.4), abs=0.1)
    assert sf.info(out).samplerate == 48000


def test_convert_progress_bar_goes_to_stderr_and_quiet_turns_it_off(capsys, tmp_audio, tmp_path):
    src = tmp_audio("in.wav", sine(1000.0, 44100, 0.5), 44100, subtype="PCM_16")
    code, out, err = run(capsys, "convert", src, tmp_path / "a.wav", "--to", 22050)
    assert code == 0 and "100.0 %" in err and "wrote" in out
    # --quiet: no progress, but the line that says what was written stays
    code, out, err = run(capsys, "convert", src, tmp_path / "b.wav", "--to", 22050, "--quiet")
    assert code == 0 and err == "" and out.startswith("wrote ") and out.count("\n") == 1
    code, out, err = run(capsys, "convert", src, tmp_path / "c.wav", "--to", 22050, "--silent")
    assert code == 0 and err == "" and out == ""


@pytest.mark.parametrize("case, rule", [
    ("unreadable", "in.wav"),
    ("unknown_format", "output file type must be one of"),
    ("zero_rate", "--to must be an integer from 1000"),
    ("nan", "non-finite sample (nan) at frame 100"),
    ("empty", "empty.wav"),
    ("same_path", "output must not be the source file"),
    ("unmeetable", "widen the transition band (20000 to 20001 Hz)"),
    ("flac_float", "FLAC carries 16- or 24-bit integer samples only"),
])
def test_convert_bad_input_is_one_line_exit_2_and_nothing_written(capsys, tmp_audio, tmp_path,
                                                                  case, rule):
    good = tmp_audio("good.wav", sine(500.0, 44100, 0.2), 44100, subtype="FLOAT")
    out = tmp_path / "out.wav"
    args = ["convert", good, out, "--to", 48000]
    if case == "unreadable":
        bad = tmp_path / "in.wav"
        bad.write_bytes(b"RIFF\x00\x00\x00\x00WAVEfmt nonsense")
        args[1] = bad
    elif case == "unknown_format":
        args[2] = tmp_path / "out.xyz"
    elif case == "zero_rate":
        args[4] = 0
    elif case == "nan":
        x = sine(500.0, 44100, 0.2)
        x[100, 0] = np.nan
        args[1] = tmp_audio("nan.wav", x, 44100, subtype="FLOAT")
    elif case == "empty":
        args[1] = tmp_audio("empty.wav", np.zeros((0, 1)), 44100, subtype="PCM_16")
    elif case == "same_path":
        args[2] = good
    elif case == "unmeetable":
        args += ["--passband", 20000, "--stopband", 20001, "--attenuation", 200,
                 "--arithmetic", "float64"]
    elif case == "flac_float":
        args[2] = tmp_path / "out.flac"
        args += ["--bits", "32f"]
    before = sorted(os.listdir(tmp_path))
    code, text, err = run(capsys, *args)
    assert code == 2
    assert err.startswith("rateferry: error: ") and rule in err, err
    assert err.count("\n") == 1
    assert sorted(os.listdir(tmp_path)) == before


def test_targets_below_the_loudness_meters_range_still_convert(tmp_audio, tmp_path):
    # BS.1770 K-weighting is defined for audio rates (our meter starts at 8 kHz); a 6 kHz output
    # still converts, with its loudness reported as unknown and its true peak measured.
    src = tmp_audio("tone.wav", sine(440.0, 48000, 1.0, amp=0.25), 48000, subtype="PCM_16")
    r = convert_file(src, tmp_path / "o.wav", fs_out=6000, spec=Spec(attenuation_db=100.0))
    assert sf.info(tmp_path / "o.wav").samplerate == 6000
    assert r.output_meters["integrated_lufs"] is None
    assert "8000 Hz" in r.output_meters["analysis_note"]
    # the delivered samples through an independent 16x reconstruction (scipy.signal.resample_poly
    # with a long scipy.signal.firwin Kaiser low-pass) read the same within 0.1 dB; both sit just
    # above 20 log10(0.25) = -12.04 dB: the converter's band-limited onset rings a little
    delivered, _ = sf.read(tmp_path / "o.wav")
    taps = signal.firwin(2049, 1 / 16, window=("kaiser", 12.0))
    reference = 20 * np.log10(np.abs(signal.resample_poly(delivered, 16, 1, window=taps)).max())
    assert r.output_meters["true_peak_dbtp"] == pytest.approx(reference, abs=0.1)
    assert r.output_meters["true_peak_dbtp"] == pytest.approx(-12.04, abs=0.1)
    assert r.source_meters["integrated_lufs"] is not None


def test_batch_gathers_blocks_in_order_and_gives_the_rest_at_the_end():
    batch = pipeline._Batch(10)
    blocks = [np.full((4, 2), k, dtype=np.float64) for k in range(4)]
    assert batch.take(blocks[0]) is None
    assert batch.take(blocks[1]) is None
    out = batch.take(blocks[2])
    np.testing.assert_array_equal(out, np.concatenate(blocks[:3]))
    assert batch.take(blocks[3]) is None
    np.testing.assert_array_equal(batch.take(None), blocks[3])
    assert batch.take(None) is None
    assert pipeline._Batch(None).take(blocks[1]) is blocks[1]
