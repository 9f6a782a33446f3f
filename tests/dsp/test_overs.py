"""Where the true peak goes over: webapp.dsp.overs against the whole-programme true-peak meter.

Reference: the true-peak meter of ITU-R BS.1770-4 (webapp.dsp.loudness.TruePeakMeter, checked in
test_loudness.py against the standard's figures): a programme whose meter reading is above a
threshold has at least one frame over it, and none when the threshold is above the reading;
the blocks the stream is cut into do not matter.
"""

import numpy as np
import pytest

from webapp.dsp.loudness import true_peak
from webapp.dsp.overs import FULL_SCALE, TruePeakOvers, full_scale_frames


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
