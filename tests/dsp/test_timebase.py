"""The real-ratio converter and the time base against physics and exact arithmetic.

Physics: a sine recorded by a clock running e fast is sin(2 pi f t_ref) evaluated at the track's
sample times; after correction it must equal the analytic sine on the reference's grid within the
mask. Exact arithmetic: Python's fractions module gives every output position exactly.
"""

from fractions import Fraction

import numpy as np
import pytest

from webapp.dsp.errors import ParameterError
from webapp.dsp.polyphase import ArbitraryConverter, real_ratio
from webapp.dsp.spec import preset
from webapp.dsp.timebase import TimeBase, correct_drift, timebase_converter, timebase_design

SPEC = preset("spoken_word_delivery")      # 100 dB, 0.05 dB ripple


def warped_sine(f_hz, fs, frames, drift_ppm, offset_ms):
    """Track samples of sin(2 pi f t_ref) with t_track = offset + (1 + e) t_ref."""
    t_track = np.arange(frames) / fs
    t_ref = (t_track - offset_ms / 1000.0) / (1 + drift_ppm * 1e-6)
    return np.sin(2 * np.pi * f_hz * t_ref)


@pytest.mark.parametrize("drift_ppm,offset_ms", [(73.0, 12.3), (-41.5, -250.0), (0.3, 0.0)])
def test_correction_returns_the_analytic_sine_on_the_reference_grid(drift_ppm, offset_ms):
    fs, n = 16000, 16000 * 20
    track = warped_sine(1234.5, fs, n + 8000, drift_ppm, offset_ms)
    tb = TimeBase(fs, fs, drift_ppm, offset_ms, frames_out=n)
    y = correct_drift(track, tb, spec=SPEC)
    ref = np.sin(2 * np.pi * 1234.5 * np.arange(n) / fs)
    # the sine is deep in the passband: the error is the ripple (0.05 dB = 0.6 %) at most, and
    # the spoken-word mask keeps it far smaller in practice; edges (filter reach, padding) excluded
    lo = 200 + max(0, int(-offset_ms / 1000 * fs))
    err = np.max(np.abs(y[lo:-200] - ref[lo:-200]))
    assert err < 10 ** (0.05 / 20) - 1
    assert y.shape == (n,)


def test_correction_to_another_rate_keeps_time():
    # a 44.1 kHz track running 20 ppm slow, brought onto a 48 kHz reference
    n_out = 48000 * 5
    track = warped_sine(997.0, 44100, 44100 * 5 + 4410, -20.0, 3.0)
    y = correct_drift(track, TimeBase(44100, 48000, -20.0, 3.0, frames_out=n_out), spec=SPEC)
    ref = np.sin(2 * np.pi * 997.0 * np.arange(n_out) / 48000)
    assert np.max(np.abs(y[400:-400] - ref[400:-400])) < 10 ** (0.05 / 20) - 1


def test_positions_stay_exact_after_hours():
    # output n of a real ratio sits at (start_num + n*down)/up exactly (fractions module)
    tb = TimeBase(48000, 48000, 37.123456789, 1234.5678, frames_out=None)
    conv = ArbitraryConverter(np.ones(65), tb.up, tb.down, 16, start=tb.start_frames)
    n0 = 48000 * 3600 * 5                       # five hours in
    a, p, eta = conv._positions(n0, 1000)
    start = Fraction(round(tb.start_frames * tb.up), tb.up)
    for k in (0, 1, 517, 999):
        pos = start + (n0 + k) * tb.step
        whole = pos.numerator // pos.denominator
        frac = pos - whole
        assert a[k] == whole
        assert p[k] == int(frac * 16)
        assert eta[k] == pytest.approx(float(frac * 16 - int(frac * 16)), abs=1e-12)
    # and the fraction held is within 1e-12 of the real ratio it stands for
    exact = Fraction(1) + Fraction(37.123456789) / 10**6
    assert abs(float(tb.step / exact - 1)) < 1e-12


def test_any_block_size_gives_the_same_output(rng):
    tb = TimeBase(8000, 8000, -63.0, 17.7, frames_out=7000)
    x = rng.standard_normal((8000, 2))
    d = timebase_design(preset("quick_preview"), tb)
    conv = timebase_converter(tb, channels=2, designed=d)
    whole = conv.process_all(x)
    for size in (1, 97, 4096):
        conv.reset()
        parts = [conv.process(x[i:i + size]) for i in range(0, x.shape[0], size)]
        parts.append(conv.flush())
        np.testing.assert_array_equal(np.concatenate(parts), whole)
    assert whole.shape == (7000, 2)


def test_the_same_time_base_fields_give_the_same_bytes(rng):
    x = rng.standard_normal(20000)
    tb = TimeBase(16000, 16000, 12.5, -3.25, frames_out=19000)
    again = TimeBase.from_dict(tb.to_dict())
    a = correct_drift(x, tb, spec=preset("quick_preview"))
    b = correct_drift(x, again, spec=preset("quick_preview"), block_frames=333)
    assert a.tobytes() == b.tobytes()
    assert (again.up, again.down) == (tb.up, tb.down)


def test_output_length_without_a_reference_length_follows_the_track():
    tb = TimeBase(48000, 48000, 100.0, 500.0)
    # (frames - start) / step frames: 48000 frames, start 24000, step 1.0001
    assert tb.output_length(48000) == -(-(48000 - 24000) * tb.up // tb.down)
    assert tb.output_length(48000) == 23998


def test_real_ratio_holds_an_exact_fraction_close_to_the_number():
    up, down = real_ratio(1 / 1.000025)
    assert abs(up / down * 1.000025 - 1) < 1e-15
    assert up < 2**40
    with pytest.raises(ParameterError, match="positive finite"):
        real_ratio(float("nan"))


@pytest.mark.parametrize("kw,field", [(dict(drift_ppm=float("inf")), "drift_ppm"),
                                      (dict(drift_ppm=20000.0), "drift_ppm"),
                                      (dict(fs_in=0), "fs_in"),
                                      (dict(frames_out=-1), "frames_out")])
def test_time_base_refuses_bad_values_by_name(kw, field):
    args = dict(fs_in=48000, fs_out=48000, drift_ppm=10.0, offset_ms=0.0)
    args.update(kw)
    with pytest.raises(ParameterError) as info:
        TimeBase(**args)
    assert info.value.field == field


def test_windows_read_in_place_equal_the_gathered_windows(monkeypatch, rng):
    # the gathered-window path is the plain oracle for the in-place stretches of a drift
    # correction (the same sums over the same inputs; only the reading differs)
    from webapp.dsp import polyphase
    tb = TimeBase(16000, 16000, 41.0, -3.5, frames_out=40000)
    x = rng.standard_normal((40200, 2))
    fast = correct_drift(x, tb, block_frames=7001)
    monkeypatch.setattr(polyphase, "_MIN_STRETCH", 10**9)
    gathered = correct_drift(x, tb, block_frames=7001)
    assert fast.shape == gathered.shape == (40000, 2)
    np.testing.assert_allclose(fast, gathered, rtol=0, atol=1e-12)
