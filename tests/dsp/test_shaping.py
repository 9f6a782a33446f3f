"""Shaped dither run as many stretches at once must give the plain loop's codes to the bit.

The reference is the textbook error-feedback requantiser, written out again here sample by
sample, independent of the module: ``v = x - sum_k h_k e[n-k]``, ``y = Q(v + d)``,
``e = y - v`` (Lipshitz, Vanderkooy & Wannamaker, "Minimally audible noise shaping", JAES
39(11), 1991, the error-feedback structure, from memory), with our two overload rules: the
code is clipped to the word and the fed-back error to +-1.5 LSB.
"""

import numpy as np
import pytest

from webapp.dsp import shaping
from webapp.dsp.dither import Quantizer, noise_transfer_taps

RATE_HZ = 48000
FEEDBACK = tuple(-noise_transfer_taps(RATE_HZ)[1:])


def textbook(x, d, low, high):
    """Frames x channels samples and dither in LSB -> codes, clipped count (plain loop)."""
    codes = np.empty_like(x)
    clipped = 0
    for c in range(x.shape[1]):
        past = [0.0] * len(FEEDBACK)            # e[n-1], e[n-2], ...
        for n in range(x.shape[0]):
            feedback = 0.0
            for h, e in zip(FEEDBACK, past):
                feedback = feedback + h * e
            v = float(x[n, c]) - feedback
            y = float(np.rint(v + float(d[n, c])))
            if y > high or y < low:
                y = min(max(y, low), high)
                clipped += 1
            e = min(max(y - v, -1.5), 1.5)
            past = [e] + past[:-1]
            codes[n, c] = y
    return codes, clipped


def programme(rng, frames, channels, scale):
    """Our own test programme, in LSB: noise bursts with quiet room noise between them, a
    stretch of digital silence longer than the run-in (where runs started anywhere do not
    join), and an overload past both rails."""
    t = np.arange(frames) / RATE_HZ
    envelope = np.where((t % 1.3) < 0.9, 1.0, 0.002) * np.abs(np.sin(2 * np.pi * 2.0 * t))
    x = scale * rng.standard_normal((frames, channels)) * envelope[:, None]
    x[60000:100000] = 0.0                                   # digital silence, 40000 frames
    x[200000:200400] = 40000.0                              # over the top rail
    x[200400:200800] = -40000.0                             # under the bottom rail
    d = rng.random((frames, channels)) + rng.random((frames, channels)) - 1.0
    return x, d


class Spy:
    """Counts the calls of a function of the module and calls it."""

    def __init__(self, monkeypatch, name):
        self.calls = 0
        real = getattr(shaping, name)

        def counted(*args, **kwargs):
            self.calls += 1
            return real(*args, **kwargs)
        monkeypatch.setattr(shaping, name, counted)


def run_blocks(x, d, sizes, low, high):
    history = shaping.new_history(x.shape[1])
    errors = [[0.0] * len(FEEDBACK) for _ in range(x.shape[1])]
    out, clipped, i, k = [], 0, 0, 0
    while i < x.shape[0]:
        n = sizes[k % len(sizes)]
        codes, count = shaping.shape_block(x[i:i + n], d[i:i + n], history, errors, FEEDBACK, low, high)
        out.append(codes)
        clipped += count
        i, k = i + n, k + 1
    return np.concatenate(out), clipped, errors


@pytest.fixture(scope="module")
def stereo():
    rng = np.random.default_rng(21)
    x, d = programme(rng, 330000, 2, 2000.0)
    return x, d, textbook(x, d, -32768, 32767)


@pytest.mark.parametrize("sizes", [[330000], [262144, 67856], [300001, 7, 29992], [5000, 280000, 45000]],
                         ids=["one block", "lanes then loop", "odd splits", "small large small"])
def test_stretches_at_once_give_the_textbook_codes_and_clip_count(stereo, sizes, monkeypatch):
    x, d, (expected, expected_clipped) = stereo
    lanes, repairs = Spy(monkeypatch, "_run_lanes"), Spy(monkeypatch, "_repair")
    codes, clipped, _ = run_blocks(x, d, sizes, -32768, 32767)
    np.testing.assert_array_equal(codes, expected)
    assert clipped == expected_clipped == 2 * 800
    assert lanes.calls >= 1                 # the many-stretch path ran ...
    assert repairs.calls >= 2               # ... and had to run the plain loop in the silence


def test_the_errors_carried_to_the_next_block_are_the_textbook_ones(stereo):
    # the state after a block is what the plain loop ends with: continuing from it with the
    # plain loop gives the same codes as running the plain loop over both parts at once
    x, d, (expected, _) = stereo
    _, _, errors = run_blocks(x[:300000], d[:300000], [300000], -32768, 32767)
    tail = np.empty((30000, 2))
    for c in range(2):
        tail[:, c], _, _ = shaping.shape_sequential(x[300000:, c], d[300000:, c], list(errors[c]),
                                                    FEEDBACK, -32768, 32767)
    np.testing.assert_array_equal(tail, expected[300000:])


def test_mono_24_bit_range_and_low_level_programme():
    rng = np.random.default_rng(4)
    x, d = programme(rng, 270000, 1, 3.0)           # a few LSB: runs take longer to join
    x[200000:200800] = 0.0                           # no overload here: nothing to clip
    low, high = -(1 << 23), (1 << 23) - 1
    expected, expected_clipped = textbook(x, d, low, high)
    codes, clipped, _ = run_blocks(x, d, [270000], low, high)
    np.testing.assert_array_equal(codes, expected)
    assert clipped == expected_clipped == 0


def test_quantizer_prefers_large_blocks_only_for_shaped_dither():
    assert Quantizer(bits="16", dither="shaped", channels=2, rate_hz=RATE_HZ).preferred_frames == 524288
    assert Quantizer(bits="16", dither="shaped", channels=1, rate_hz=RATE_HZ).preferred_frames == 1 << 20
    assert Quantizer(bits="16", dither="tpdf", channels=2).preferred_frames is None

