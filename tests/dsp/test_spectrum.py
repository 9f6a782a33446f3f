"""Welch spectra (webapp.dsp.spectrum.welch_spectrum) against scipy.signal.welch.

Reference: scipy.signal.welch, the general-purpose reference PSD estimator, with the same
settings (periodic Hann window, 50 % overlap, constant detrend, one-sided density), averaged over
channels; float64 throughout, so the two agree to rounding (1e-12 relative). Physics: a sine of
amplitude A carries power A^2 / 2 (Parseval), which the density integrates to.
"""

import numpy as np
import pytest
from scipy import signal

from webapp.dsp.errors import ParameterError
from webapp.dsp.spectrum import smooth_length, welch_spectrum


@pytest.mark.parametrize("frames, nperseg, rate_hz", [
    (229000, 8192, 44100),       # even segments, many batches of them
    (249000, 8910, 48000),       # the target length of a 44.1 -> 48 kHz spectrum
    (30001, 1001, 44100),        # odd segment length: no Nyquist bin
    (5000, 8192, 44100),         # shorter than one segment: one segment of the whole
    (20, 8192, 8000),            # shorter than the 16-frame minimum
])
def test_welch_spectrum_equals_scipy_welch(rng, frames, nperseg, rate_hz):
    x = rng.standard_normal((frames, 2)) * [0.3, 0.05] + 0.01
    freqs, psd_db = welch_spectrum(x, rate_hz, nperseg=nperseg)
    f_ref, p_ref = signal.welch(x, fs=rate_hz, window="hann", nperseg=min(nperseg, frames),
                                axis=0)
    np.testing.assert_array_equal(freqs, f_ref)
    np.testing.assert_allclose(10 ** (psd_db / 10), p_ref.mean(axis=1), rtol=1e-12)


def test_welch_spectrum_of_a_sine_integrates_to_its_power():
    rate = 48000
    t = np.arange(rate * 2) / rate
    x = 0.5 * np.sin(2 * np.pi * 1000.5 * t)
    freqs, psd_db = welch_spectrum(x, rate)
    power = np.sum(10 ** (psd_db / 10)) * (freqs[1] - freqs[0])
    assert power == pytest.approx(0.5 ** 2 / 2, rel=1e-3)   # Parseval: A^2 / 2


def test_welch_spectrum_needs_a_frame():
    with pytest.raises(ParameterError, match="at least one frame"):
        welch_spectrum(np.zeros((0, 2)), 44100)


def test_smooth_length_is_the_nearest_length_without_a_prime_factor_above_11():
    assert smooth_length(8916) == 8910            # 4 x 3 x 743 -> 2 x 3^4 x 5 x 11
    assert smooth_length(8192) == 8192
    assert smooth_length(17832) == 17820
    for n in (16, 997, 8916, 17832, 65537):
        m = smooth_length(n)
        rest = m
        for p in (2, 3, 5, 7, 11):
            while rest % p == 0:
                rest //= p
        assert rest == 1
        # nothing nearer qualifies (brute force over the gap)
        for k in range(n - abs(m - n) + 1, n + abs(m - n)):
            r = k
            for p in (2, 3, 5, 7, 11):
                while r % p == 0:
                    r //= p
            assert r != 1 or k == m
    with pytest.raises(ParameterError):
        smooth_length(0)
