"""The artefact audit against definitions, textbook values and an independent response.

References used by the checks (each named again beside its test):
* AES17-2015, "AES standard method for digital audio engineering - Measurement of digital audio
  equipment": dBFS (a full-scale sine reads 0 dBFS), THD+N (rms after notching the fundamental,
  band-limited to 20 Hz - 20 kHz, relative to the band-limited signal), dynamic range (the
  THD+N measurement on 997 Hz at -60 dBFS, plus 60 dB). Clause numbers are from memory.
* scipy.signal.freqz on the design's own taps: the reference response. For an L/M converter a
  tone at f leaves a line at the zero-stuffed frequency nu (nu = f for an alias, k fs_in +- f
  for an image) at level |H(nu)| / L (the textbook up-filter-down model, Crochiere & Rabiner,
  Multirate Digital Signal Processing, 1983, ch. 2).
* Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical Survey", JAES
  40(5), 1992: TPDF dither of 2 LSB peak to peak plus rounding leaves error power q^2/4, so
  16-bit dithered silence reads 20 log10(2^-16 sqrt 2) = -93.32 dBFS.
* Physical truth: a linear-phase conversion puts output n at time n / fs_out of the input, so
  the analytic tones sampled at the new rate line up with the output to a tiny fraction of a
  sample.
"""

from dataclasses import replace
import json
import math

import numpy as np
import pytest
from scipy import optimize, signal

from webapp.dsp.audit import (AES17_FREQUENCY_HZ, AuditResult, audit, band_rms_dbfs,
                              convert_channels, line_spectrum, log_sweep, multitone,
                              residual_dbfs, settle_time_s, silence, steady_segment, thd_n_db,
                              tone)
from webapp.dsp.design import design
from webapp.dsp.errors import ParameterError
from webapp.dsp.spec import Spec, preset
from webapp.dsp.stages import choose_plan

# Measured and predicted lines agree to about 1e-5 dB down to -150 dB in float64 (rounding of
# the converter's products sits near -300 dB); 0.01 dB leaves room for other BLAS builds while
# still catching any real difference in level.
LEVEL_TOLERANCE_DB = 0.01
RESOLVED_DB = -160.0


def freqz_db(taps, freqs_hz, rate_hz, gain):
    """20 log10 |H(f)| / gain from scipy.signal.freqz, the reference library."""
    _, h = signal.freqz(taps, worN=np.asarray(freqs_hz, dtype=np.float64), fs=rate_hz)
    return 20 * np.log10(np.abs(h) / gain)


@pytest.fixture(scope="module")
def kaiser_48k_16k():
    d = design(Spec(method="kaiser"), 48000, 16000)
    return d, audit(d)


@pytest.fixture(scope="module")
def music_44k1_48k():
    d = design(preset("music_delivery"), 44100, 48000)
    return d, audit(d)


# ------------------------------------------------------------------ definitions (AES17)

def test_full_scale_sine_reads_zero_dbfs_and_levels_follow_aes17():
    # AES17-2015 (clause 3, from memory): 0 dBFS is the rms of a sine whose peak reaches full
    # scale, so a sine of peak 10**(L/20) reads L dBFS.
    for level in (0.0, -1.0, -60.0):
        x = tone(48000, 997, level_dbfs=level, duration_s=1.0)
        assert np.max(np.abs(x)) == pytest.approx(10 ** (level / 20), rel=1e-9)
        assert band_rms_dbfs(x, 48000, low_hz=0.0, high_hz=math.inf) == pytest.approx(level,
                                                                                       abs=1e-9)


def test_thd_n_definition_with_a_known_second_harmonic():
    # AES17 THD+N ratio: notch the fundamental, band-limit 20 Hz - 20 kHz, relative to the
    # band-limited total. A -60 dB second harmonic reads 20 log10(1e-3 / sqrt(1 + 1e-6)).
    rate = 48000
    x = tone(rate, 997, level_dbfs=-1.0) + tone(rate, 1994, level_dbfs=-61.0)
    expected = 20 * math.log10(1e-3 / math.sqrt(1 + 1e-6))
    assert thd_n_db(x, rate, 997) == pytest.approx(expected, abs=1e-6)
    # a component outside the measurement band (below 20 Hz, above 20 kHz) does not count
    out_of_band = x + tone(rate, 10, level_dbfs=-20.0) + tone(rate, 21000, level_dbfs=-20.0)
    assert thd_n_db(out_of_band, rate, 997) == pytest.approx(expected, abs=1e-6)
    # the residual in dBFS is the harmonic's own level
    assert residual_dbfs(x, rate, 997) == pytest.approx(-61.0, abs=1e-6)


def test_pure_tone_has_thd_n_at_the_float64_floor():
    x = tone(44100, AES17_FREQUENCY_HZ, level_dbfs=-1.0)
    assert thd_n_db(x, 44100) < -250.0


def test_thd_n_refuses_a_segment_without_a_bin_at_the_fundamental():
    x = tone(48000, 997, frames=48000 // 2 + 7)
    with pytest.raises(ParameterError, match="no bin at 997 Hz"):
        thd_n_db(x, 48000, 997)


# ------------------------------------------------------------------ test signals

def test_multitone_lines_carry_the_requested_amplitudes_and_phases():
    freqs = [50, 997, 5000, 15999]
    amps = [0.1, 0.2, 0.05, 0.3]
    phases = [0.0, 1.0, -2.0, 3.0]
    x = multitone(32000, freqs, amplitudes=amps, phases_rad=phases, duration_s=2.0)
    f, lines = line_spectrum(x[:32000], 32000)
    assert np.allclose(np.abs(lines[freqs]), amps, atol=1e-13)
    assert np.allclose(np.angle(lines[freqs]), phases, atol=1e-10)
    others = np.delete(np.abs(lines), freqs)
    assert np.max(others) < 1e-13
    # periodic with period one second: the second second repeats the first
    assert np.allclose(x[:32000], x[32000:], atol=1e-15)
    # default: equal Schroeder-phase tones scaled to a -1 dBFS peak
    y = multitone(32000, freqs)
    assert np.max(np.abs(y)) == pytest.approx(10 ** (-1 / 20), rel=1e-12)


def test_log_sweep_runs_from_its_start_to_the_source_nyquist():
    # Exponential sweep: instantaneous frequency f1 (f2/f1)**(t/T) (Farina, AES 108th
    # Convention, 2000). Measured from the unwrapped phase of the analytic signal.
    rate, f1 = 44100, 20.0
    x = log_sweep(rate, duration_s=2.0, start_hz=f1)
    z = signal.hilbert(x)
    inst = np.diff(np.unwrap(np.angle(z))) * rate / (2 * np.pi)
    for t in (0.5, 1.0, 1.5):
        n = int(t * rate)
        expected = f1 * (rate / 2 / f1) ** (t / 2.0)
        assert np.median(inst[n - 50:n + 50]) == pytest.approx(expected, rel=0.01)
    assert np.max(np.abs(x)) <= 10 ** (-1 / 20) + 1e-12


def test_silence_is_exact_zeros_without_dither_and_tpdf_noise_with_it():
    assert not np.any(silence(48000, duration_s=0.1))
    # Lipshitz et al. 1992: TPDF (2 LSB p-p) plus rounding leaves q^2 / 4, i.e. -93.32 dBFS at
    # 16 bits and -141.48 dBFS at 24 bits (rms q/2, times sqrt 2 for AES17 dBFS).
    for bits, expected in (("16", -93.32), ("24", -141.48)):
        x = silence(48000, duration_s=1.0, dither="tpdf", bits=bits, seed=3)
        assert band_rms_dbfs(x, 48000, low_hz=0.0, high_hz=math.inf) == pytest.approx(
            expected, abs=0.1)


# ------------------------------------------------------------------ a route where the math is known

def test_kaiser_aliases_match_the_response_of_its_taps(kaiser_48k_16k):
    d, r = kaiser_48k_16k
    # 48 kHz -> 16 kHz is up 1 / down 3: a stopband tone at f aliases with level |H(f)|
    # (scipy.signal.freqz of the taps at 48 kHz, gain 1).
    assert r.direction == "down" and r.separation == "residue"
    stop = r.alias_in_stopband
    assert np.count_nonzero(stop) > 100
    assert np.all(r.alias_input_hz[stop] >= d.mask.stopband_hz)
    ref = freqz_db(d.taps, r.alias_input_hz, 48000, d.up)
    resolved = ref > RESOLVED_DB
    assert np.count_nonzero(resolved) > 100
    assert np.max(np.abs(r.alias_db[resolved] - ref[resolved])) < LEVEL_TOLERANCE_DB
    # the worst alias is the largest of them and meets the 120 dB mask
    assert r.worst_alias_db == pytest.approx(np.max(ref[stop]), abs=LEVEL_TOLERANCE_DB)
    assert r.worst_alias_db <= -120.0
    assert r.worst_alias_predicted_db == pytest.approx(r.worst_alias_db, abs=LEVEL_TOLERANCE_DB)
    # the alias lands where folding says: f mod 16000, mirrored into 0 .. 8000
    expected_out = np.abs(((r.alias_input_hz + 8000) % 16000) - 8000)
    assert np.array_equal(r.alias_output_hz, expected_out)


def test_kaiser_passband_deviation_matches_the_response_of_its_taps(kaiser_48k_16k):
    d, r = kaiser_48k_16k
    ref = freqz_db(d.taps, r.deviation_hz, 48000, d.up)
    assert r.deviation_hz.size > 200
    assert r.deviation_hz.max() == math.floor(d.mask.passband_hz)
    assert np.max(np.abs(r.deviation_db - ref)) < 1e-6
    assert r.passband_deviation_db == pytest.approx(np.max(np.abs(ref)), abs=1e-6)
    assert r.passband_deviation_db <= d.mask.ripple_db
    assert r.passes


def test_rational_route_aliases_and_images_match_the_response():
    # 48 kHz -> 44.1 kHz is up 147 / down 160, prototype at 7.056 MHz with gain 147.
    d = design(Spec(method="kaiser"), 48000, 44100)
    r = audit(d)
    nu = np.where(r.alias_input_hz > 22050, r.alias_input_hz, 48000 - r.alias_input_hz)
    ref = freqz_db(d.taps, nu, d.filter_rate_hz, d.up)
    resolved = ref > RESOLVED_DB
    assert np.count_nonzero(resolved) > 200
    assert np.max(np.abs(r.alias_db[resolved] - ref[resolved])) < LEVEL_TOLERANCE_DB
    assert r.worst_alias_db <= -120.0 and r.passes


def test_upsampling_images_match_the_response(music_44k1_48k):
    d, r = music_44k1_48k
    # 44.1 kHz -> 48 kHz: an in-band tone at f makes its first image at 44100 - f.
    assert r.direction == "up"
    ref = freqz_db(d.taps, 44100 - r.alias_input_hz, d.filter_rate_hz, d.up)
    resolved = ref > RESOLVED_DB
    assert np.count_nonzero(resolved) > 100
    assert np.max(np.abs(r.alias_db[resolved] - ref[resolved])) < LEVEL_TOLERANCE_DB
    assert -130.0 < r.worst_alias_db <= -120.0
    assert r.worst_alias_predicted_db == pytest.approx(r.worst_alias_db, abs=LEVEL_TOLERANCE_DB)


def test_worst_line_of_each_tone_is_found_beyond_the_first_image():
    # 16 kHz -> 48 kHz (up 3): a tone at f < 8 kHz makes lines at 16000 - f and 16000 + f in
    # 0 .. 24 kHz. An equiripple stopband is flat, so the second is often the larger one; the
    # worst line per tone is max |H| / 3 over both (freqz of the taps at 48 kHz).
    d = design(Spec(method="equiripple", attenuation_db=90.0, ripple_db=0.1,
                    passband_fraction=0.85), 16000, 48000)
    r = audit(d)
    f = r.alias_input_hz
    both = np.maximum(freqz_db(d.taps, 16000 - f, 48000, 3), freqz_db(d.taps, 16000 + f, 48000, 3))
    assert np.max(np.abs(r.alias_worst_db - both)) < LEVEL_TOLERANCE_DB
    assert np.count_nonzero(r.alias_worst_db > r.alias_db + 1.0) > 50
    assert r.worst_alias_db == pytest.approx(np.max(both[r.alias_in_stopband]),
                                             abs=LEVEL_TOLERANCE_DB)
    assert r.worst_alias_predicted_db == pytest.approx(r.worst_alias_db, abs=LEVEL_TOLERANCE_DB)


def test_multistage_plan_is_audited_through_its_cascade():
    plan = choose_plan(replace(preset("music_delivery"), stages="auto"), 48000, 8000)
    assert hasattr(plan, "stages")
    r = audit(plan)
    # the cascade's response is the product of its stages' (noble identities; stages.py)
    ref = sum(freqz_db(s.taps, r.alias_input_hz, s.filter_rate_hz, s.phases) for s in plan.stages)
    resolved = ref > RESOLVED_DB
    assert np.count_nonzero(resolved) > 100
    assert np.max(np.abs(r.alias_db[resolved] - ref[resolved])) < LEVEL_TOLERANCE_DB
    assert r.passes and r.worst_alias_db <= -120.0
    assert r.group_delay_ms == pytest.approx(plan.latency_ms, abs=1e-9)


# ------------------------------------------------------------------ weak filters are caught

def test_weak_firwin_filter_is_caught_with_aliases_where_its_response_puts_them():
    good = design(Spec(method="kaiser"), 48000, 16000)
    h = signal.firwin(31, 8000, fs=48000)   # 31 taps, cutoff at the new Nyquist
    weak = replace(good, taps=h, numtaps=h.size, delay_samples=(h.size - 1) // 2,
                   taps_per_phase=h.size)
    r = audit(weak)
    ref = freqz_db(h, r.alias_input_hz, 48000, 1.0)
    assert np.max(np.abs(r.alias_db - ref)) < LEVEL_TOLERANCE_DB
    assert r.worst_alias_db == pytest.approx(np.max(ref[r.alias_in_stopband]),
                                             abs=LEVEL_TOLERANCE_DB)
    assert r.worst_alias_db > -10.0           # about -6 dB at the cutoff
    rows = {row.figure: row for row in r.verdict}
    assert not rows["worst alias"].passes
    assert not rows["passband deviation"].passes
    assert not r.passes


def test_design_that_meets_a_loose_mask_fails_a_strict_one():
    loose = design(Spec(attenuation_db=30.0, ripple_db=1.0, method="kaiser"), 48000, 16000)
    own = audit(loose)
    assert own.passes and -45.0 < own.worst_alias_db <= -30.0
    strict = design(preset("music_delivery"), 48000, 16000).mask
    judged = audit(loose, mask=strict)
    rows = {row.figure: row for row in judged.verdict}
    assert rows["worst alias"].limit == -120.0 and not rows["worst alias"].passes
    assert judged.worst_alias_db == pytest.approx(own.worst_alias_db, abs=1e-9)
    assert not judged.passes


# ------------------------------------------------------------------ THD+N through the converter

def test_thd_n_of_a_converted_pure_tone_is_far_below_minus_100_db(music_44k1_48k):
    d, r = music_44k1_48k
    # AES17 THD+N of 997 Hz at -1 dBFS. The only artefacts are the tone's images (each below
    # the 120 dB mask); their levels from freqz of the taps predict the figure.
    assert r.fundamental_hz == 997.0
    assert r.thd_n_db < -130.0
    assert r.thd_n_db == pytest.approx(r.thd_n_predicted_db, abs=LEVEL_TOLERANCE_DB)
    assert r.thd_n_db <= r.thd_n_limit_db


def test_thd_n_of_a_converted_tone_with_a_known_second_harmonic(music_44k1_48k):
    d, _ = music_44k1_48k
    settle = settle_time_s(d)
    frames = 44100 + 2 * math.ceil(settle * 44100) + 8
    x = (tone(44100, 997, level_dbfs=-1.0, frames=frames)
         + tone(44100, 1994, level_dbfs=-61.0, frames=frames))
    y = convert_channels(d, x)
    seg = steady_segment(y, 48000, start_s=(frames - 44100) / 2 / 44100)
    # AES17 definition: -60 dB harmonic -> THD+N of 20 log10(1e-3 / sqrt(1 + 1e-6)) dB; the
    # passband gains at 997 and 1994 Hz differ by under 1e-5 dB
    assert thd_n_db(seg, 48000, 997) == pytest.approx(
        20 * math.log10(1e-3 / math.sqrt(1 + 1e-6)), abs=1e-3)


# ------------------------------------------------------------------ time

def test_linear_phase_alignment_error_is_a_tiny_fraction_of_a_sample(music_44k1_48k):
    d, r = music_44k1_48k
    assert abs(r.alignment_error_samples) < 1e-4
    assert abs(r.alignment_error_us) < 1e-4 / 48000 * 1e6 + 1e-12
    assert abs(r.sweep_alignment_samples) < 1e-3
    # the removed look-ahead is the whole group delay; nothing is left at the output
    assert abs(r.residual_delay_ms) < 1e-6
    assert r.group_delay_ms == pytest.approx(d.latency_ms, abs=1e-9)
    row = next(v for v in r.verdict if v.figure == "time alignment")
    assert row.passes


def test_prering_measured_at_the_output_matches_the_taps(music_44k1_48k, kaiser_48k_16k):
    # design.py measures pre-ringing on the taps at the filter rate (first tap within 60 dB of
    # the peak); the audit merges the converter's responses to impulses at 32 sub-sample
    # offsets, so it resolves the same time to a fraction of an output sample.
    for d, r in (music_44k1_48k, kaiser_48k_16k):
        assert r.prering_ms == pytest.approx(d.prering_ms, abs=0.25 * 1000.0 / d.fs_out)
    d, r = music_44k1_48k
    assert r.impulse_response.max() == pytest.approx(1.0)
    peak_time = r.impulse_ms[int(np.argmax(r.impulse_response))]
    assert abs(peak_time) < 1e-9      # aligned: the peak sits on the impulse


def test_minimum_phase_shows_its_delay():
    d = design(Spec(phase="minimum", method="kaiser", attenuation_db=100.0), 48000, 16000)
    lin = design(Spec(method="kaiser", attenuation_db=100.0), 48000, 16000)
    r, r_lin = audit(d), audit(lin)
    latency_samples = d.latency_ms * 16000 / 1000
    assert latency_samples > 2.0 and abs(r_lin.alignment_error_samples) < 1e-4
    # group delay from the output impulse response = the design's median passband group delay
    assert r.group_delay_ms * 16 == pytest.approx(latency_samples, abs=0.01)
    # alignment: the peak of the cross-correlation of output and analytic tones, predicted from
    # freqz of the taps at the same tones (equal weights)
    _, h = signal.freqz(d.taps, worN=r.deviation_hz, fs=48000)

    def neg(s):
        return -float(np.real(np.sum(h * np.exp(2j * np.pi * r.deviation_hz * s))))

    s_grid = np.linspace(0, 10 / 16000, 4001)
    s0 = s_grid[int(np.argmin([neg(s) for s in s_grid]))]
    s_best = optimize.minimize_scalar(neg, bounds=(s0 - 1e-5, s0 + 1e-5), method="bounded",
                                      options=dict(xatol=1e-12)).x
    assert r.alignment_error_samples == pytest.approx(s_best * 16000, abs=0.02)
    assert r.alignment_error_samples > 2.0
    row = next(v for v in r.verdict if v.figure == "reported latency")
    assert row.passes


# ------------------------------------------------------------------ noise with dither

def test_tpdf_dithered_silence_through_the_converter(kaiser_48k_16k):
    d, _ = kaiser_48k_16k
    r = audit(d, dither="tpdf", bits="16", seed=7)
    # source: Lipshitz et al. 1992, -93.32 dBFS for 16-bit TPDF
    assert r.source_idle_noise_dbfs == pytest.approx(-93.32, abs=0.1)
    # white noise through the converter keeps sum(h^2) / L of its power (zero-stuffing by L,
    # filtering, then sampling every phase equally often)
    gain_db = 10 * math.log10(np.sum(d.taps ** 2) / d.up)
    assert r.idle_noise_full_dbfs == pytest.approx(r.source_idle_noise_dbfs + gain_db, abs=0.25)
    # AES17 dynamic range: with TPDF the noise does not depend on the signal, so the notched
    # -60 dBFS tone reads the idle noise in the same band; dynamic range is its negative
    assert r.noise_floor_dbfs == pytest.approx(r.idle_noise_dbfs, abs=0.4)
    assert r.dynamic_range_db == pytest.approx(-r.noise_floor_dbfs)
    # undithered, the converter's own floor is far lower and converted silence stays silent
    _, clean = kaiser_48k_16k
    assert clean.noise_floor_dbfs < -250.0 and clean.idle_noise_dbfs == -math.inf


# ------------------------------------------------------------------ result shape and errors

def test_figures_are_json_ready_with_the_cli_keys(music_44k1_48k):
    _, r = music_44k1_48k
    assert isinstance(r, AuditResult)
    fig = r.figures()
    text = json.dumps(fig, allow_nan=False)
    back = json.loads(text)
    for key in ("passband_deviation_db", "worst_alias_db", "thd_n_db", "noise_floor_dbfs",
                "group_delay_ms", "verdict"):
        assert key in back
    assert back["worst_alias_db"] == pytest.approx(r.worst_alias_db)
    assert [row["figure"] for row in back["verdict"]] == [v.figure for v in r.verdict]
    assert all(set(row) == {"figure", "measured", "limit", "passes", "unit", "rule"}
               for row in back["verdict"])
    assert back["idle_noise_dbfs"] is None       # digital silence: -inf has no JSON form
    curves = back["curves"]
    assert len(curves["alias"]["input_hz"]) == r.alias_input_hz.size
    assert len(curves["deviation"]["measured_db"]) == r.deviation_hz.size


def test_one_to_one_route_has_no_aliases():
    d = design(Spec(), 48000, 48000)
    r = audit(d)
    assert r.direction == "same" and r.worst_alias_db is None and r.alias_input_hz.size == 0
    assert [v.figure for v in r.verdict] == ["passband deviation", "THD+N", "time alignment"]
    assert r.passes and r.figures()["worst_alias_db"] is None


def test_bad_inputs_raise_parameter_errors(kaiser_48k_16k):
    d, _ = kaiser_48k_16k
    with pytest.raises(ParameterError, match="Design or a multistage Plan") as err:
        audit("48000 to 16000")
    assert err.value.field == "design"
    with pytest.raises(ParameterError, match="dither must be one of") as err:
        audit(d, dither="pink")
    assert err.value.field == "dither"
    with pytest.raises(ParameterError, match="bits must be one of"):
        audit(d, dither="tpdf", bits="12")
    with pytest.raises(ParameterError, match="whole numbers of Hz"):
        multitone(48000, [997.5])
    with pytest.raises(ParameterError, match="rate_hz must be an integer"):
        tone(0, 997)
