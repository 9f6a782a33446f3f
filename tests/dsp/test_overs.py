"""Where the true peak goes over: webapp.dsp.overs against the whole-programme true-peak meter.

Reference: the true-peak meter of ITU-R BS.1770-4 (webapp.dsp.truepeak.TruePeakMeter, checked in
test_loudness.py against the standard's figures): a programme whose meter reading is above a
threshold has at least one frame over it, and none when the threshold is above the reading;
the blocks the stream is cut into do not matter. The plain oracle of the 16x reconstruction is
scipy.signal.upfirdn with the interpolator as one FIR (webapp.dsp.oversample.prototype), as in
test_loudness.py.
"""

import numpy as np
import pytest
from scipy import signal

from webapp.dsp.errors import ParameterError
from webapp.dsp.truepeak import true_peak
from webapp.dsp.overs import FULL_SCALE, TruePeakOvers, full_scale_frames, over_floor
from webapp.dsp.oversample import EDGE_FRAMES, PeakInterpolator, prototype


def test_overs_agree_with_the_true_peak_meter_and_ignore_block_boundaries():
    rng = np.random.default_rng(7)
    x = rng.standard_normal((48000, 2)) * 0.15
    reading = true_peak(x, 48000)                       # dBTP of the whole programme
    found = {}
    for block in (48000, 4096, 1001):
        finder = TruePeakOvers(channels=2, threshold_dbtp=reading - 0.5)
        parts = [finder.process(x[i:i + block]) for i in range(0, x.shape[0], block)]
        frames = np.concatenate(parts + [finder.finish()])
        found[block] = frames
    assert found[48000].size >= 1
    assert all(np.array_equal(found[48000], f) for f in found.values())
    above = TruePeakOvers(channels=2, threshold_dbtp=reading + 0.01)
    assert above.process(x).size == 0 and above.finish().size == 0


def test_full_scale_frames_are_the_clipped_ones():
    x = np.zeros((100, 2))
    x[10, 0] = 1.0
    x[20, 1] = -32767 / 32768                # the largest negative 16-bit code but one
    x[30, 0] = 0.999
    assert np.flatnonzero(full_scale_frames(x)).tolist() == [10, 20]
    assert FULL_SCALE == pytest.approx(32767 / 32768)


def _oracle_envelope(x):
    """Per-frame true-peak envelope by scipy.signal.upfirdn (frames -EDGE_FRAMES to
    frames + EDGE_FRAMES - 1, the 16 points n + i/16 of each), per channel."""
    h, delay = prototype()
    y = np.abs(signal.upfirdn(h, x, 16, axis=0))
    padded = np.zeros((16 * (x.shape[0] + 2 * EDGE_FRAMES), x.shape[1]))
    first = delay - 16 * EDGE_FRAMES
    padded[max(0, -first):max(0, -first) + y.shape[0] - max(0, first)] = \
        y[max(0, first):][:padded.shape[0]]
    return padded.reshape(-1, 16, x.shape[1]).max(axis=1)


def test_no_over_comes_from_samples_under_the_floor(rng):
    # the floor's bound holds for the plainest worst case: the samples' signs matching the
    # interpolator's taps (every product adds up), scaled to just under the floor; and for noise
    # and a full-scale sine scaled the same way (the oracle is scipy.signal.upfirdn)
    h, delay = prototype()
    floor = over_floor(0.0)
    phases = h[:h.size - h.size % 16].reshape(-1, 16).T          # the 16 phases' taps
    worst = np.sign(phases[np.abs(phases).sum(axis=1).argmax()])[::-1]
    k = np.arange(4000)
    signals = [np.r_[np.zeros(100), worst, np.zeros(100)], rng.standard_normal(4000),
               np.sin(2 * np.pi * 0.45 * k + 0.3)]
    for x in signals:
        x = (0.999 * floor / np.abs(x).max()) * x
        assert _oracle_envelope(x[:, None]).max() <= 1.0
        finder = TruePeakOvers(channels=1, threshold_dbtp=0.0)
        assert finder.process(x).size == 0 and finder.finish().size == 0
    # the floor is the threshold over the two stages' gains: 0 dBTP needs samples above -13 dB
    assert 20 * np.log10(floor) == pytest.approx(-13.3, abs=0.1)
    assert over_floor(-6.0) == pytest.approx(floor * 10 ** (-6 / 20))
    with pytest.raises(ParameterError, match="threshold_dbtp"):
        over_floor(float("nan"))


def _worst_case():
    """Signs matching the 16x interpolator's loudest phase (every product adds up), and the
    peak of its reconstruction for samples of 1 (the oracle's: scipy.signal.upfirdn)."""
    h, _ = prototype()
    phases = h[:h.size - h.size % 16].reshape(-1, 16).T
    worst = np.sign(phases[np.abs(phases).sum(axis=1).argmax()])[::-1]
    x = np.r_[np.zeros(100), worst, np.zeros(100)]
    return x, _oracle_envelope(x[:, None]).max()


def test_overs_are_the_frames_the_oracle_reconstructs_over_the_threshold(rng):
    # the oracle is scipy.signal.upfirdn with the interpolator as one FIR; frames within the
    # float32 products' error of the threshold (1e-5) may go either way. Signals: the quietest
    # samples that can go over (the worst case at +0.2 dBTP: samples at -9.4 dB, not far above the
    # floor that lets a search skip them), noise, and a sine near Nyquist
    worst, gain = _worst_case()
    k = np.arange(6000)
    signals = [np.tile(worst * (1.023 / gain), 3)[:, None],
               np.clip(rng.standard_normal((30000, 2)) * 0.3, -1, 1),
               np.column_stack([1.05 * np.sin(2 * np.pi * 0.45 * k + 0.3), 0.2 * np.sin(k)])]
    assert 20 * np.log10(1.023 / gain) < -9.0
    for x in signals:
        envelope = _oracle_envelope(x).max(axis=1)
        frames = np.arange(envelope.size) - EDGE_FRAMES
        sure = np.unique(np.clip(frames[envelope > 1 + 1e-5], 0, x.shape[0] - 1))
        maybe = np.unique(np.clip(frames[envelope > 1 - 1e-5], 0, x.shape[0] - 1))
        assert sure.size > 0
        for block in (x.shape[0], 4096, 1001):
            finder = TruePeakOvers(channels=x.shape[1], threshold_dbtp=0.0)
            found = np.concatenate([finder.process(x[i:i + block])
                                    for i in range(0, x.shape[0], block)] + [finder.finish()])
            assert np.all(np.diff(found) > 0)
            assert np.isin(sure, found).all() and np.isin(found, maybe).all()


@pytest.mark.parametrize("level", [1.0, 0.7, 10 ** (-0.1 / 20)])
def test_the_overs_mode_reports_the_frames_of_the_envelope_over_the_level(rng, level):
    # the plain path as the oracle of the fast one: the envelope (process with the level as
    # its floor, rows that cannot reach it reporting their bound) compared with the level
    x = np.clip(rng.standard_normal((40000, 2)) * 0.25, -1, 1)
    x[:8000] *= 0.1                                           # chunks skipped whole
    plain = PeakInterpolator(2)
    envelope = np.concatenate([plain.process(x, level), plain.finish(level)]).max(axis=1)
    expected = np.flatnonzero(envelope > level) - EDGE_FRAMES
    assert expected.size > 0
    for block in (40000, 8192, 777):
        fast = PeakInterpolator(2)
        found = np.concatenate([fast.overs(x[i:i + block], level)
                                for i in range(0, x.shape[0], block)] + [fast.finish_overs(level)])
        np.testing.assert_array_equal(found, expected)
