"""Word length, TPDF dither and noise shaping against quantisation theory.

Sources named beside each check:
- Ideal N-bit quantiser, full-scale sine: SNR = 6.02 N + 1.76 dB, exactly 10 log10(1.5 * 4**N)
  (16 bit 98.09 dB, 24 bit 146.26 dB): Pohlmann, Principles of Digital Audio; Kester, ADI
  tutorial MT-001.
- Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical Survey", JAES
  40(5):355-375, 1992: undithered error power q^2/12; TPDF dither (2 LSB peak to peak, variance
  q^2/6) makes the total error's mean 0 and variance q^2/4 (+4.77 dB) whatever the input.
- Gerzon & Craven, "Optimal noise shaping and dither of digital signals", AES 87th Convention,
  1989, preprint 2822 (from memory): for a minimum-phase noise transfer function with leading
  tap 1 the mean of ln|NTF| over frequency is 0.
- Terhardt, "Calculating virtual pitch", Hearing Research 1:155-182, 1979: threshold of hearing
  in quiet T(f) = 3.64 f^-0.8 - 6.5 exp(-0.6 (f - 3.3)^2) + 1e-3 f^4 (f in kHz), as quoted by
  Bosi & Goldberg, Introduction to Digital Audio Coding and Standards (2003): the shape the
  shaped noise is designed to follow.

Statistical tolerances are several standard errors of the estimate for N = 2**18 samples; the
generators are seeded, so each run is the same run.
"""

import math

import numpy as np
import pytest
from scipy import signal

from webapp.dsp.dither import (
    DITHERS, WORD_LENGTHS, Quantizer, noise_shaping_design, noise_transfer_taps, threshold_in_quiet_db,
)
from webapp.dsp.errors import ParameterError

N = 2 ** 18
# a frequency incommensurate with the rate, so the error does not repeat with the sine
SINE_CYCLES_PER_SAMPLE = (math.sqrt(5) - 1) / 2 / 7.3


def lsb(word):
    return 2.0 ** -(word - 1)


def total_error_lsb(quantizer, x, word):
    """Output minus input in LSB (codes of "24" are shifted left by 8)."""
    codes = quantizer.process(x).astype(np.float64)
    if word == 24:
        codes /= 256.0
    return codes - x * 2.0 ** (word - 1)


def sine(amplitude, n=N):
    return amplitude * np.sin(2 * np.pi * SINE_CYCLES_PER_SAMPLE * np.arange(n))


def test_public_names_are_pinned():
    assert WORD_LENGTHS == ("16", "24", "32f", "64f")
    assert DITHERS == ("none", "tpdf", "shaped")
    assert Quantizer(bits="16").dither == "tpdf"
    assert Quantizer(bits="32f").dither == "none"
    assert Quantizer(bits="16").dtype == np.int16
    assert Quantizer(bits=24).dtype == np.int32


# --- signal-to-noise ratio -----------------------------------------------------------------------

@pytest.mark.parametrize("word", [16, 24])
def test_undithered_full_scale_sine_snr_is_6_02_n_plus_1_76_db(word):
    # Pohlmann; Kester MT-001: SNR = 20 log10(2**N sqrt(1.5)) for amplitude 2**(N-1) LSB. The
    # largest code is 2**(N-1) - 1, so the sine is one LSB short of full scale (-0.0003 dB at
    # 16 bits, included). Tolerance 0.03 dB: 4 standard errors of the error power estimate
    # (0.0076 dB for uniform error, N = 2**18).
    amplitude = 1.0 - lsb(word)
    error = total_error_lsb(Quantizer(bits=str(word), dither="none"), sine(amplitude), word) * lsb(word)
    measured = 10 * np.log10(np.mean(sine(amplitude) ** 2) / np.mean(error ** 2))
    theory = 10 * np.log10(1.5 * 4.0 ** word) + 20 * np.log10(amplitude)
    assert measured == pytest.approx(theory, abs=0.03)
    assert theory == pytest.approx({16: 98.09, 24: 146.26}[word], abs=0.005)


@pytest.mark.parametrize("word", [16, 24])
def test_tpdf_dither_raises_the_error_power_by_4_77_db(word):
    # Lipshitz, Wannamaker & Vanderkooy 1992: total error power 3 q^2/12 with TPDF dither, so the
    # full-scale sine SNR drops by 10 log10(3) = 4.77 dB (16 bit: 93.32 dB). The sine keeps 2 LSB
    # of headroom so the dither never clips. Tolerance 0.05 dB: 4 standard errors (0.0125 dB).
    amplitude = 1.0 - 2 * lsb(word)
    quantizer = Quantizer(bits=str(word), dither="tpdf", seed=1)
    error = total_error_lsb(quantizer, sine(amplitude), word) * lsb(word)
    measured = 10 * np.log10(np.mean(sine(amplitude) ** 2) / np.mean(error ** 2))
    theory = 10 * np.log10(1.5 * 4.0 ** word / 3) + 20 * np.log10(amplitude)
    assert measured == pytest.approx(theory, abs=0.05)
    assert quantizer.clipped_samples == 0
    if word == 16:
        assert theory == pytest.approx(93.32, abs=0.005)


# --- moments of the total error ------------------------------------------------------------------

INPUTS_LSB = {
    "dc 0": np.zeros(N),
    "dc 0.25": np.full(N, 0.25),
    "dc 0.3": np.full(N, 0.3),
    "dc 0.5": np.full(N, 0.5),
    "dc -3.77": np.full(N, -3.77),
    "sine 0.7 lsb": sine(0.7),
    "sine 1000 lsb": sine(1000.0) + 0.123,
}


@pytest.mark.parametrize("name", sorted(INPUTS_LSB))
def test_tpdf_total_error_has_mean_0_and_variance_q2_over_4_whatever_the_input(name):
    # Lipshitz, Wannamaker & Vanderkooy 1992: with TPDF dither E[e] = 0 and E[e^2] = q^2/4 for
    # every input. Standard errors for N = 2**18: mean <= 0.001 LSB, variance <= 0.35 %;
    # tolerances 0.005 LSB and 2 % (about 5 standard errors).
    x = INPUTS_LSB[name] * lsb(16)
    error = total_error_lsb(Quantizer(bits="16", dither="tpdf", seed=7), x, 16)
    assert abs(error.mean()) < 0.005
    assert error.var() == pytest.approx(0.25, rel=0.02)


def test_undithered_error_moments_depend_on_the_input_so_the_moment_test_can_fail():
    # Without dither the error is a deterministic function of the input: a DC of 0.3 LSB gives
    # the constant error -0.3 LSB (variance 0), a 0.7 LSB sine is squared off. The same checks as
    # above reject them.
    failures = []
    for name, values in INPUTS_LSB.items():
        error = total_error_lsb(Quantizer(bits="16", dither="none"), values * lsb(16), 16)
        if abs(error.mean()) >= 0.005 or abs(error.var() / 0.25 - 1) >= 0.02:
            failures.append(name)
    assert set(failures) == set(INPUTS_LSB)


def test_tpdf_error_is_uncorrelated_with_a_low_level_sine_but_undithered_error_is_not():
    # Lipshitz et al. 1992: TPDF renders the error independent of the signal in its first two
    # moments, so its correlation with the signal vanishes (standard error 1/sqrt(N) = 0.002;
    # bound 0.01); an undithered 0.7 LSB sine turns into a square-ish wave whose error follows it.
    x = sine(0.7) * lsb(16)
    dithered = total_error_lsb(Quantizer(bits="16", dither="tpdf", seed=3), x, 16)
    plain = total_error_lsb(Quantizer(bits="16", dither="none"), x, 16)
    assert abs(np.corrcoef(dithered, x)[0, 1]) < 0.01
    assert abs(np.corrcoef(plain, x)[0, 1]) > 0.3


# --- noise shaping -------------------------------------------------------------------------------

SHAPED_RATES = [8000, 16000, 22050, 32000, 44100, 48000, 96000, 192000]


def test_threshold_curve_matches_terhardts_formula_at_known_points():
    # Terhardt 1979: the curve's dip of the ear's most sensitive region lies near 3.3 kHz, below
    # 0 dB SPL; at 1 kHz the formula gives 3.64 - 6.5 exp(-3.174) + 0.001 = 3.37 dB (computed)
    assert threshold_in_quiet_db(1000.0) == pytest.approx(3.64 - 6.5 * math.exp(-0.6 * 2.3 ** 2) + 1e-3,
                                                         abs=1e-12)
    freqs = np.linspace(100, 15000, 2000)
    assert 3000 < freqs[np.argmin(threshold_in_quiet_db(freqs))] < 3600
    assert threshold_in_quiet_db(3300.0) < 0.0


@pytest.mark.parametrize("rate_hz", SHAPED_RATES)
def test_noise_transfer_function_is_minimum_phase_with_leading_tap_one(rate_hz):
    # Gerzon & Craven 1989 (from memory): mean of ln|NTF| over 0..pi is 0 for a minimum-phase NTF
    # with leading tap 1 (exact for a minimum-phase design; 1e-4 is the error of the mean over a
    # 65536-point grid that omits the end point).
    ntf = noise_transfer_taps(rate_hz)
    assert ntf[0] == 1.0
    assert ntf.size == 10
    _, response = signal.freqz(ntf, worN=1 << 16)
    assert abs(np.mean(np.log(np.abs(response)))) < 1e-4
    assert np.max(np.abs(np.roots(ntf))) < 1.0


@pytest.mark.parametrize("rate_hz, tolerance_db", [(44100, 2.0), (48000, 2.0), (96000, 3.0)])
def test_noise_transfer_function_follows_the_threshold_curve(rate_hz, tolerance_db):
    # The intended shape (Terhardt 1979): from 500 Hz to 12 kHz the NTF in dB stays within
    # +-2 dB (+-3 dB at 96 kHz, where nine taps span a band twice as wide) of the threshold
    # curve moved down by a constant.
    freqs = np.geomspace(500, 12000, 200)
    _, response = signal.freqz(noise_transfer_taps(rate_hz), worN=freqs, fs=rate_hz)
    offset = 20 * np.log10(np.abs(response)) - threshold_in_quiet_db(freqs)
    assert np.max(np.abs(offset - np.mean(offset))) < tolerance_db


@pytest.mark.parametrize("rate_hz", [8000, 16000, 44100, 48000, 96000])
def test_measured_shaped_noise_follows_the_design_and_is_quieter_to_the_ear(rate_hz):
    # The requantisation error of "shaped" must have the spectrum |NTF|^2 times the flat TPDF
    # level (1/4 LSB^2, white: Lipshitz et al. 1992), within 1 dB in each third of the band;
    # weighted by the threshold curve (10^(-T/10)) it is quieter than plain TPDF by the stated
    # number of dB (noise_shaping_design: 13.9 dB at 44.1 kHz, 14.9 at 48 kHz, 2.1 at 8 kHz),
    # measured within 0.3 dB.
    x = np.zeros(N)
    flat = total_error_lsb(Quantizer(bits="16", dither="tpdf", seed=5), x, 16)
    shaped = total_error_lsb(Quantizer(bits="16", dither="shaped", seed=5, rate_hz=rate_hz), x, 16)
    freqs, flat_psd = signal.welch(flat, fs=rate_hz, nperseg=4096)
    _, shaped_psd = signal.welch(shaped, fs=rate_hz, nperseg=4096)
    design = noise_shaping_design(rate_hz)
    _, response = signal.freqz(design.ntf, worN=freqs, fs=rate_hz)
    intended = np.abs(response) ** 2 * np.mean(flat_psd[1:-1])
    for band in np.array_split(np.arange(1, freqs.size - 1), 3):
        measured_db = 10 * np.log10(np.mean(shaped_psd[band]) / np.mean(intended[band]))
        assert abs(measured_db) < 1.0
    curve = threshold_in_quiet_db(freqs)
    weight = 10 ** (-np.minimum(curve, curve.min() + 40.0) / 10)
    weighted_db = 10 * np.log10(np.sum(shaped_psd * weight) / np.sum(flat_psd * weight))
    assert weighted_db == pytest.approx(design.weighted_gain_db, abs=0.3)
    assert weighted_db < -1.0
    if rate_hz in (44100, 48000):
        assert weighted_db < -13.5
    # total power: flat 1/4 LSB^2 times sum(ntf^2), within 3 %
    assert shaped.var() == pytest.approx(0.25 * np.sum(design.ntf ** 2), rel=0.03)


def test_shaped_dither_survives_overload_and_counts_clipping_exactly():
    # Guard against error-feedback instability: 2000 samples at 1.5 x full scale clip, then a
    # -20 dBFS sine. The fed-back error is bounded by 1.5 LSB, so the feedback term stays below
    # 1.5 * sum|h| (about 31 LSB): no code clips after the overload, and the total error of
    # every later sample stays within 1.5 * (1 + sum|h|) LSB.
    rate = 44100
    overload = np.full(2000, 1.5)
    quiet = 0.1 * np.sin(2 * np.pi * 997 * np.arange(20000) / rate)
    quantizer = Quantizer(bits="16", dither="shaped", seed=11, rate_hz=rate)
    codes = quantizer.process(np.concatenate([quiet[:5000], overload, quiet]))
    assert quantizer.clipped_samples == 2000
    assert np.all(codes[5000:7000] == 32767)
    bound = 1.5 * (1 + np.sum(np.abs(noise_transfer_taps(rate)[1:])))
    after = codes[7000:].astype(np.float64) - quiet * 32768
    assert np.max(np.abs(after)) <= bound
    # and the noise is back to its shaped level within 100 samples
    assert np.var(after[100:]) == pytest.approx(0.25 * np.sum(noise_transfer_taps(rate) ** 2), rel=0.1)


@pytest.mark.parametrize("rate_hz", [4000, 6000])
def test_shaped_dither_refuses_rates_below_8000(rate_hz):
    with pytest.raises(ParameterError, match=f'from 8000 Hz up; use dither="tpdf" at {rate_hz} Hz'):
        Quantizer(bits="16", dither="shaped", rate_hz=rate_hz)
    with pytest.raises(ParameterError, match="needs rate_hz"):
        Quantizer(bits="16", dither="shaped")


# --- codes, clipping, streaming --------------------------------------------------------------

def test_clipping_is_counted_exactly():
    # codes run from -32768 to 32767: +1.0 (32768) clips, -1.0 does not
    x = np.array([[1.0, -1.0], [1.5, -1.5], [0.99, -0.99], [32767.4 / 32768, -32768.6 / 32768]])
    quantizer = Quantizer(bits="16", dither="none", channels=2)
    codes = quantizer.process(x)
    assert quantizer.clipped_samples == 4
    np.testing.assert_array_equal(codes, [[32767, -32768], [32767, -32768], [32440, -32440], [32767, -32768]])
    # with TPDF, a sample 2 LSB over full scale always clips; the count accumulates over calls
    tpdf = Quantizer(bits="24", dither="tpdf", seed=2)
    tpdf.process(np.full(1000, 1.0 + 2 * lsb(24)))
    tpdf.process(np.full(500, -1.0 - 2 * lsb(24)))
    tpdf.process(np.zeros(500))
    assert tpdf.clipped_samples == 1500


def test_24_bit_codes_sit_in_the_top_24_bits_of_int32():
    # soundfile writes the top 24 bits of int32 data to PCM_24: code << 8, low byte zero
    x = np.array([0.0, 0.5, -0.5, 1.0 - lsb(24), -1.0, 3 * lsb(24)])
    codes = Quantizer(bits="24", dither="none").process(x)
    assert codes.dtype == np.int32
    np.testing.assert_array_equal(codes & 0xFF, 0)
    np.testing.assert_array_equal(codes >> 8, [0, 1 << 22, -(1 << 22), (1 << 23) - 1, -(1 << 23), 3])
    np.testing.assert_array_equal(codes, np.round(x * 2.0 ** 31).astype(np.int64).clip(-2 ** 31, 2 ** 31 - 1))


def test_float_word_lengths_pass_samples_through_and_refuse_dither():
    x = np.array([[0.1, -1.5], [0.25, 2.0]])
    np.testing.assert_array_equal(Quantizer(bits="64f", channels=2).process(x), x)
    out32 = Quantizer(bits="32f", channels=2).process(x)
    assert out32.dtype == np.float32
    np.testing.assert_array_equal(out32, x.astype(np.float32))
    with pytest.raises(ParameterError, match='float output .32f. takes dither="none", got .tpdf.'):
        Quantizer(bits="32f", dither="tpdf")


@pytest.mark.parametrize("dither", ["none", "tpdf", "shaped"])
def test_quantizer_is_block_size_invariant_and_bit_exact_on_rerun(dither, rng):
    # the dither is drawn per sample in frame order (channels interleaved) and the shaping state
    # carries over, so any split of the same samples gives the same codes
    x = 0.3 * rng.standard_normal((30000, 2))
    whole = Quantizer(bits="16", dither=dither, seed=9, channels=2, rate_hz=48000).process(x)
    again = Quantizer(bits="16", dither=dither, seed=9, channels=2, rate_hz=48000).process(x)
    np.testing.assert_array_equal(again, whole)
    quantizer = Quantizer(bits="16", dither=dither, seed=9, channels=2, rate_hz=48000)
    pieces, i = [], 0
    while i < x.shape[0]:
        step = int(rng.integers(1, 3000))
        pieces.append(quantizer.process(x[i:i + step]))
        i += step
    np.testing.assert_array_equal(np.concatenate(pieces), whole)
    if dither != "none":
        other_seed = Quantizer(bits="16", dither=dither, seed=10, channels=2, rate_hz=48000).process(x)
        assert np.count_nonzero(other_seed != whole) > 1000


def test_quantizer_rejects_bad_parameters_and_blocks():
    with pytest.raises(ParameterError, match="bits must be one of 16, 24, 32f, 64f, got '20'"):
        Quantizer(bits="20")
    with pytest.raises(ParameterError, match="dither must be one of none, tpdf, shaped, got 'rpdf'"):
        Quantizer(bits="16", dither="rpdf")
    with pytest.raises(ParameterError, match="seed must be an integer >= 0"):
        Quantizer(bits="16", seed=-1)
    quantizer = Quantizer(bits="16", channels=2)
    with pytest.raises(ParameterError, match=r"2 channel\(s\), got shape \(4,\)"):
        quantizer.process(np.zeros(4))
    with pytest.raises(ParameterError, match="floating-point"):
        quantizer.process(np.zeros((4, 2), dtype=np.int32))
    with pytest.raises(ParameterError, match="finite"):
        quantizer.process(np.array([[0.0, np.nan]]))
