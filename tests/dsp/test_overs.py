"""Where the true peak goes over: webapp.dsp.overs against the whole-programme true-peak meter.

Reference: the true-peak meter of ITU-R BS.1770-4 (webapp.dsp.loudness.TruePeakMeter, checked in
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
from webapp.dsp.loudness import true_peak
from webapp.dsp.overs import FULL_SCALE, TruePeakOvers, full_scale_frames, over_floor
from webapp.dsp.oversample import EDGE_FRAMES, prototype


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
