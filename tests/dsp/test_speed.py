"""Speed changes against physics and exact arithmetic.

Physics: a sine at f played p/q times as fast is a sine at f * p/q; its frequency is measured by a
coherent four-parameter sine fit (least squares for amplitude, phase, offset and frequency, as in
IEEE Std 1057; from memory). Arithmetic: the output length is ceil(frames * q/p) at the same rate.
Trade factors (common practice): pull-down 1000/1001, pull-up 1001/1000, 24/25 and 25/24.
"""

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import optimize

from webapp.dsp.errors import ParameterError
from webapp.dsp.rates import parse_speed, speed_change, true_rate_change
from webapp.dsp.spec import Spec, preset
from webapp.dsp.speed import change_speed, speed_design

SPEC = preset("spoken_word_delivery")


def sine_fit_hz(y, fs, f0):
    """Four-parameter least-squares sine fit; returns the frequency in Hz."""
    t = np.arange(y.size) / fs

    def resid(params):
        f, a, b, c = params
        w = 2 * np.pi * f * t
        return a * np.cos(w) + b * np.sin(w) + c - y

    w = 2 * np.pi * f0 * t
    basis = np.stack([np.cos(w), np.sin(w), np.ones_like(t)], axis=1)
    a, b, c = np.linalg.lstsq(basis, y, rcond=None)[0]
    fit = optimize.least_squares(resid, [f0, a, b, c], x_scale=[1e-3, 1, 1, 1], xtol=1e-15,
                                 ftol=1e-15, gtol=1e-15)
    return fit.x[0]


@pytest.mark.parametrize("speed", ["1000/1001", "1001/1000", "24/25", "25/24", "3/2"])
def test_a_sine_comes_out_at_f_times_the_factor_and_the_length_is_exact(speed):
    fs, frames, f = 48000, 48000, 1000.0
    x = np.sin(2 * np.pi * f * np.arange(frames) / fs)
    change = speed_change(fs, fs, speed)
    y = change_speed(x, change, spec=SPEC)
    p, q = Fraction(speed).numerator, Fraction(speed).denominator
    assert y.size == math.ceil(frames * q / p)           # ceil(frames * q / p), exact integers
    mid = y[2000:-2000]
    f_out = sine_fit_hz(mid, fs, f * p / q)
    assert f_out == pytest.approx(f * p / q, rel=1e-9)


def test_the_output_rate_is_the_one_asked_for():
    # 24/25 from 44.1 kHz delivered at 48 kHz: a 441 Hz sine comes out at 441 * 24/25 Hz on the
    # 48 kHz grid, and the length is ceil(frames * 48000/44100 * 25/24)
    x = np.sin(2 * np.pi * 441.0 * np.arange(44100) / 44100)
    change = speed_change(44100, 48000, "24/25")
    y = change_speed(x, change, spec=SPEC)
    assert y.size == math.ceil(44100 * Fraction(48000, 44100) * Fraction(25, 24))
    assert sine_fit_hz(y[2000:-2000], 48000, 423.36) == pytest.approx(441.0 * 24 / 25, rel=1e-9)


def test_pull_down_then_pull_up_returns_the_source_within_the_ripple():
    fs = 48000
    spec = Spec(ripple_db=0.01, attenuation_db=120.0)
    t = np.arange(fs) / fs
    tones = [(0.3, 440.0), (0.2, 3000.0), (0.2, 12000.0), (0.1, 19000.0)]
    x = sum(a * np.sin(2 * np.pi * f * t + f) for a, f in tones)
    down = change_speed(x, speed_change(fs, fs, "1000/1001"), spec=spec)
    back = change_speed(down, speed_change(fs, fs, "1001/1000"), spec=spec)
    assert down.size == -(-x.size * 1001 // 1000)     # ceil(n * q / p) for p/q = 1000/1001
    assert back.size == -(-down.size * 1000 // 1001)
    # two passes: each tone within twice the mask's ripple, plus two stopband leaks
    bound = sum(a for a, _ in tones) * (10 ** (2 * 0.01 / 20) - 1) + 2 * 10 ** (-120 / 20)
    err = np.max(np.abs(back[3000:x.size - 3000] - x[3000:-3000]))
    assert err < bound


def test_a_file_can_be_taken_at_its_stated_true_rate():
    # recorded at 48000*1000/1001 Hz, labelled 48000: a 1 kHz tone reads 1001 Hz as labelled;
    # taken at its true rate and delivered at 48 kHz it is 1 kHz again
    true = Fraction(48_000_000, 1001)
    frames = 48000
    x = np.sin(2 * np.pi * 1000.0 * np.arange(frames) / float(true))
    change = true_rate_change(48000, "48000000/1001", 48000)
    assert change.speed == Fraction(1000, 1001)
    y = change_speed(x, change, spec=SPEC)
    assert y.size == math.ceil(frames * Fraction(1001, 1000))
    assert sine_fit_hz(y[2000:-2000], 48000, 1000.0) == pytest.approx(1000.0, rel=1e-9)


def test_speed_design_uses_the_exact_polyphase_path_and_scales_edges_given_in_hz():
    change = speed_change(48000, 48000, "1000/1001")
    d = speed_design(Spec(passband_hz=20000.0, stopband_hz=23900.0, attenuation_db=100.0),
                     change)
    assert d.path == "polyphase" and (d.up, d.down) == (1001, 1000)
    assert d.mask.passband_hz == pytest.approx(20000.0 * 48048 / 48000)


@pytest.mark.parametrize("value", ["0.999", "1/10", "abc", 1.5, "100001/100000", "3/0"])
def test_speed_factors_must_be_exact_and_in_range(value):
    with pytest.raises(ParameterError, match="speed must be a factor P/Q") as info:
        parse_speed(value)
    assert info.value.field == "speed"


def test_factors_too_complex_for_the_rates_are_refused():
    with pytest.raises(ParameterError, match="choose a simpler factor"):
        speed_change(44100, 48000, "99991/99989")
