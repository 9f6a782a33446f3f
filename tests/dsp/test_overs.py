"""Where the true peak goes over: webapp.dsp.overs against the whole-programme true-peak meter.

Reference: the true-peak meter of ITU-R BS.1770-4 (webapp.dsp.loudness.TruePeakMeter, checked in
test_loudness.py against the standard's figures): a programme whose meter reading is above a
threshold has at least one frame over it, and none when the threshold is above the reading;
the blocks the stream is cut into do not matter. The plain oracle of the 16x reconstruction is
scipy.signal.upfirdn with the interpolator as one FIR (webapp.dsp.oversample.prototype), as in
test_loudness.py; float32 products allow 1e-5 dB (relative 1e-6) against it.
"""

import numpy as np
import pytest
from scipy import signal

from webapp.dsp.loudness import TruePeakMeter, true_peak
from webapp.dsp.overs import FULL_SCALE, TruePeakOvers, TruePeakScan, full_scale_frames
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


def _scan(x, threshold_dbtp, block, rate_hz=48000):
    scan = TruePeakScan(rate_hz=rate_hz, channels=x.shape[1], threshold_dbtp=threshold_dbtp)
    parts = [scan.process(x[i:i + block]) for i in range(0, x.shape[0], block)]
    return np.concatenate(parts + [scan.finish()]), scan.result()


@pytest.mark.parametrize("threshold_dbtp", [0.0, -3.0, 3.0])
def test_one_scan_finds_the_oracles_overs_and_reads_the_meters_true_peak(rng, threshold_dbtp):
    # channel 0 loud with a burst at fs/4 whose crest (1.2) lies between samples; channel 1
    # quiet: its floor stays at its own running peak, under the threshold
    x = np.column_stack([rng.standard_normal(60000) * 0.2, rng.standard_normal(60000) * 0.02])
    k = np.arange(480)
    x[30000:30480, 0] = 1.2 * np.sin(np.pi / 2 * k + np.pi / 4)
    limit = 10 ** (threshold_dbtp / 20)
    envelope = _oracle_envelope(x)
    level = envelope.max(axis=1)
    frames = np.arange(-EDGE_FRAMES, x.shape[0] + EDGE_FRAMES)
    surely = np.unique(np.clip(frames[level > limit * (1 + 1e-6)], 0, x.shape[0] - 1))
    maybe = np.unique(np.clip(frames[level > limit * (1 - 1e-6)], 0, x.shape[0] - 1))
    meter = TruePeakMeter(rate_hz=48000, channels=2)
    meter.process(x)
    reading = meter.result()
    for block in (x.shape[0], 8192, 1001):
        overs, result = _scan(x, threshold_dbtp, block)
        # every frame the oracle puts over is found, and nothing the oracle puts under
        assert np.isin(surely, overs).all() and np.isin(overs, maybe).all()
        assert (overs.size > 0) == (threshold_dbtp < 1.6)      # the burst reads +1.6 dBTP
        # the meter's figures: the same interpolator, rows computed in other products
        np.testing.assert_allclose(result.channel_true_peak_dbtp,
                                   reading.channel_true_peak_dbtp, atol=1e-5)
        np.testing.assert_allclose(result.channel_true_peak_dbtp,
                                   20 * np.log10(envelope.max(axis=0)), atol=1e-5)
        assert result.channel_sample_peak_dbfs == reading.channel_sample_peak_dbfs
        assert result.true_peak_dbtp == max(result.channel_true_peak_dbtp)
        assert result.oversampling == 16


def test_scan_of_silence_reads_minus_infinity_and_no_overs():
    overs, result = _scan(np.zeros((5000, 2)), 0.0, 4096)
    assert overs.size == 0
    assert result.true_peak_dbtp == result.sample_peak_dbfs == -np.inf
