"""Channel layouts: the fold-down laws by arithmetic, and loudness of what is delivered.

Sources: the pan-law choices are common practice (-6.02, -3.01 and 0 dB per channel); the
loudness figures follow from ITU-R BS.1770-4 (channel powers add, G = 1 for L, R, C).
"""

import numpy as np
import pytest

from webapp.dsp.channels import apply_layout, output_channels
from webapp.dsp.errors import ParameterError
from webapp.dsp.loudness import integrated_loudness


def stereo(rng, n=48000 * 5):
    t = np.arange(n) / 48000
    centre = 0.1 * np.sin(2 * np.pi * 440 * t)
    return centre, np.c_[centre + 0.05 * rng.standard_normal(n), centre + 0.05 * rng.standard_normal(n)]


@pytest.mark.parametrize("law, scale", [("half", 0.5), ("equal_power", 2 ** -0.5), ("sum", 1.0)])
def test_mono_fold_down_follows_its_law(law, scale, rng):
    _, x = stereo(rng)
    mono = apply_layout(x, "mono", law=law)
    assert mono.shape == (x.shape[0], 1)
    np.testing.assert_allclose(mono[:, 0], scale * (x[:, 0] + x[:, 1]), rtol=1e-15)


def test_half_law_keeps_a_centred_sound_and_equal_power_keeps_uncorrelated_power(rng):
    # BS.1770-4: a centre-panned sound read in stereo is 3.01 LU above one channel of it; folded
    # with "half" it is that one channel (-3.01 LU from the stereo reading). Uncorrelated noise
    # folded with "equal_power" keeps the power of one channel.
    centre, _ = stereo(rng)
    both = np.c_[centre, centre]
    assert integrated_loudness(apply_layout(both, "mono"), 48000) == pytest.approx(
        integrated_loudness(both, 48000) - 3.0103, abs=0.01)
    noise = 0.1 * rng.standard_normal((48000 * 10, 2))
    folded = apply_layout(noise, "mono", law="equal_power")
    assert np.var(folded) == pytest.approx(np.var(noise[:, 0]), rel=0.02)


def test_pick_and_mono_to_stereo(rng):
    _, x = stereo(rng)
    np.testing.assert_array_equal(apply_layout(x, "pick", pick=2)[:, 0], x[:, 1])
    mono = x[:, :1]
    np.testing.assert_array_equal(apply_layout(mono, "stereo"), np.c_[mono, mono])
    np.testing.assert_array_equal(apply_layout(x, "stereo"), x)
    assert output_channels(6, "keep") == 6 and output_channels(2, "mono") == 1


def test_layouts_refuse_what_cannot_apply():
    with pytest.raises(ParameterError, match="pick_channel must be from 1 to 2 for a 2-channel source, got 3"):
        apply_layout(np.zeros((10, 2)), "pick", pick=3)
    with pytest.raises(ParameterError, match="the source has 6 channels"):
        output_channels(6, "stereo")
    with pytest.raises(ParameterError, match="channel_layout must be one of keep, mono, pick, stereo"):
        output_channels(2, "surround")
    with pytest.raises(ParameterError, match="mono_law must be one of half, equal_power, sum"):
        apply_layout(np.zeros((10, 2)), "mono", law="loud")
