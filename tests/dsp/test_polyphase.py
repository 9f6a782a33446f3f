"""The streaming converter against a naive oracle, scipy.signal.upfirdn and physics.

Oracle: zero-stuff by L, convolve with the prototype, keep every M-th sample (the textbook
definition of rational conversion, e.g. Crochiere & Rabiner, Multirate DSP, 1983, ch. 2).
Reference library: scipy.signal.upfirdn with the same taps. Physics: a sine below the passband
edge, sampled analytically at the new rate, must come out within the spec's ripple; a sine in the
stopband must come out at least the spec's attenuation down.
"""

import math

import numpy as np
import pytest
from scipy import signal

from webapp.dsp.design import design
from webapp.dsp.errors import ParameterError
from webapp.dsp.polyphase import (ArbitraryConverter, PolyphaseConverter, convert,
                                  make_converter, output_length)
from webapp.dsp.spec import Spec, preset
from webapp.dsp.stages import choose_plan


def naive(x, h, up, down, delay):
    xu = np.zeros((x.shape[0] * up, x.shape[1]))
    xu[::up] = x
    full = np.stack([np.convolve(xu[:, c], h) for c in range(x.shape[1])], axis=1)
    n = output_length(x.shape[0], up, down)
    idx = np.arange(n) * down + delay
    out = np.zeros((n, x.shape[1]))
    ok = idx < full.shape[0]
    out[ok] = full[idx[ok]]
    return out


def run_blocks(conv, x, sizes):
    conv.reset()
    parts, i, k = [], 0, 0
    while i < x.shape[0]:
        n = sizes[k % len(sizes)]
        parts.append(conv.process(x[i:i + n]))
        i += n
        k += 1
    parts.append(conv.flush())
    return np.concatenate(parts, axis=0)


GRID = [(160, 147, 1201), (147, 160, 1333), (1, 3, 151), (4, 1, 97), (1, 2, 63), (3, 2, 41),
        (2, 3, 9), (1, 1, 31), (5, 7, 351)]


@pytest.mark.parametrize("up, down, numtaps", GRID)
@pytest.mark.parametrize("channels", [1, 2, 3])
def test_equals_naive_oracle_and_upfirdn_in_float64(up, down, numtaps, channels, rng):
    h = rng.standard_normal(numtaps)
    x = rng.standard_normal((700, channels))
    delay = (numtaps - 1) // 2
    ref = naive(x, h, up, down, delay)
    y = PolyphaseConverter(h, up, down, channels=channels).process_all(x)
    scale = np.max(np.abs(ref))
    assert y.shape == ref.shape == (math.ceil(700 * up / down), channels)
    assert np.max(np.abs(y - ref)) / scale <= 1e-12
    # scipy.signal.upfirdn with the same taps equals our converter with no delay removed
    u = signal.upfirdn(h, x, up, down, axis=0)
    y0 = PolyphaseConverter(h, up, down, channels=channels, delay=0).process_all(x)
    m = min(u.shape[0], y0.shape[0])
    assert m == y0.shape[0]
    assert np.max(np.abs(u[:m] - y0)) / scale <= 1e-12


# Any split of the input into blocks gives the same output to the last bit (the streaming
# contract; a recipe re-run with another block size compares the output's sha256).
@pytest.mark.parametrize("up, down, numtaps", GRID[:6])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_block_size_invariance_one_sample_random_and_whole(up, down, numtaps, dtype, rng):
    h = rng.standard_normal(numtaps)
    x = rng.standard_normal((400, 2))
    conv = PolyphaseConverter(h, up, down, channels=2, dtype=dtype)
    whole = conv.process_all(x)
    np.testing.assert_array_equal(run_blocks(conv, x, [1]), whole)
    np.testing.assert_array_equal(run_blocks(conv, x, list(rng.integers(1, 97, size=50))), whole)


@pytest.mark.parametrize("up, down, numtaps", [(160, 147, 1201), (147, 160, 1333), (1, 3, 151),
                                               (4, 1, 97), (1, 2, 215)])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_the_same_bits_for_any_block_split_over_many_tiles(up, down, numtaps, dtype, rng):
    # long enough for several products of full size before the flush, in blocks that end
    # anywhere in them: 1 frame, a prime, the pipeline's 65536, random sizes
    h = rng.standard_normal(numtaps)
    x = rng.standard_normal((300_001, 2))
    conv = PolyphaseConverter(h, up, down, channels=2, dtype=dtype)
    whole = conv.process_all(x)
    assert whole.shape == (output_length(300_001, up, down), 2)
    for sizes in ([1, 1, 2999], [65536], list(rng.integers(1, 40_000, size=30))):
        np.testing.assert_array_equal(run_blocks(conv, x, sizes), whole)
    # and each channel alone comes out as it does beside the other
    mono = PolyphaseConverter(h, up, down, channels=1, dtype=dtype).process_all(x[:, 1:])
    np.testing.assert_array_equal(mono[:, 0], whole[:, 1])


@pytest.mark.parametrize("up, down, numtaps", [(160, 147, 1201), (1, 3, 151), (4, 1, 97)])
def test_float32_matches_float64_oracle(up, down, numtaps, rng):
    h = rng.standard_normal(numtaps)
    x = rng.standard_normal((500, 2))
    ref = naive(x, h, up, down, (numtaps - 1) // 2)
    y = PolyphaseConverter(h, up, down, channels=2, dtype="float32").process_all(x)
    assert y.dtype == np.float32
    assert np.max(np.abs(y - ref)) / np.max(np.abs(ref)) <= 1e-5


def test_minimum_phase_keeps_its_delay(rng):
    h = rng.standard_normal(63)
    x = rng.standard_normal((300, 1))
    y = PolyphaseConverter(h, 3, 2, channels=1, delay=0).process_all(x)
    assert np.max(np.abs(y - naive(x, h, 3, 2, 0))) <= 1e-12 * np.max(np.abs(y))


def test_bad_blocks_and_factors_are_refused():
    conv = PolyphaseConverter(np.ones(5), 2, 1, channels=2)
    with pytest.raises(ParameterError, match="frames x 2 channels"):
        conv.process(np.zeros((10, 3)))
    with pytest.raises(ParameterError, match="coprime"):
        PolyphaseConverter(np.ones(5), 4, 2)


def analytic_sine(freq, rate, frames, amp=0.5, phase=0.3):
    return amp * np.sin(2 * np.pi * freq * np.arange(frames) / rate + phase)


ROUTES = [(44100, 48000), (48000, 44100), (48000, 16000), (24000, 96000), (44100, 22050)]


@pytest.mark.parametrize("fs_in, fs_out", ROUTES)
def test_passband_sines_match_the_analytic_sine_at_the_new_rate(fs_in, fs_out):
    spec = preset("music_delivery")
    d = design(spec, fs_in, fs_out)
    frames = fs_in // 2
    for f in (997.0, 0.5 * d.mask.passband_hz, 0.98 * d.mask.passband_hz):
        x = analytic_sine(f, fs_in, frames)
        y = convert(x, d)
        ideal = analytic_sine(f, fs_out, y.size)
        # away from the start and end transients, amplitude error within the ripple and the
        # residual (phase/alignment error) at the stopband level
        lo, hi = y.size // 4, 3 * y.size // 4
        err = y[lo:hi] - ideal[lo:hi]
        tol = 0.5 * (10 ** (spec.ripple_db / 20) - 1) + 0.5 * 10 ** (-spec.attenuation_db / 20) * 4
        assert np.max(np.abs(err)) <= tol, (f, np.max(np.abs(err)))


@pytest.mark.parametrize("fs_in, fs_out", [(48000, 44100), (48000, 16000), (44100, 22050)])
def test_stopband_sine_comes_out_at_least_the_attenuation_down(fs_in, fs_out):
    spec = Spec(attenuation_db=100.0, ripple_db=0.05)
    d = design(spec, fs_in, fs_out)
    f = 0.5 * (d.mask.stopband_hz + fs_in / 2)       # folds into the output band
    x = analytic_sine(f, fs_in, fs_in // 2, amp=1.0)
    y = convert(x, d)
    mid = y[y.size // 4: 3 * y.size // 4]
    assert 20 * np.log10(np.max(np.abs(mid))) <= -spec.attenuation_db


def coherent_levels_db(y, rate, freqs):
    """Amplitude (dB re 1.0) of each whole-Hz frequency over one whole second in the middle of y.

    Integer frequencies are exactly periodic over a 1 s segment, so the DFT has no leakage.
    """
    seg = y[rate: 2 * rate]
    n = np.arange(rate)
    return [20 * np.log10(2 * abs(np.dot(seg, np.exp(-2j * np.pi * f * n / rate))) / rate + 1e-300)
            for f in freqs]


@pytest.mark.parametrize("fs_in, fs_out", [(24000, 96000), (44100, 48000)])
def test_images_of_an_upsampled_sine_are_below_the_attenuation(fs_in, fs_out):
    spec = Spec(attenuation_db=100.0, ripple_db=0.05)
    d = design(spec, fs_in, fs_out)
    y = convert(analytic_sine(5000.0, fs_in, 3 * fs_in, amp=1.0), d)
    # images sit at k fs_in +- 5000 Hz and fold about multiples of fs_out into the output band
    folded = {abs((k * fs_in + s * 5000 + fs_out // 2) % fs_out - fs_out // 2)
              for k in range(1, 12) for s in (-1, 1)}
    images = sorted(folded - {5000})
    assert len(images) >= 3
    main, *levels = coherent_levels_db(y, fs_out, [5000] + images)
    assert abs(main) <= spec.ripple_db
    assert max(levels) <= -spec.attenuation_db


def test_arbitrary_path_agrees_with_the_exact_bank_below_the_stopband_level():
    # 44.1 -> 48 kHz both ways: exact 160/147 bank, and the interpolated table forced by a
    # small bank limit. The difference must stay below the mask's stopband level.
    spec = Spec(attenuation_db=100.0, ripple_db=0.05, arithmetic="float64")
    exact = design(spec, 44100, 48000)
    arb = design(spec, 44100, 48000, max_bank_taps=1000)
    assert exact.path == "polyphase" and arb.path == "arbitrary"
    rng = np.random.default_rng(7)
    x = signal.lfilter(*signal.butter(8, 15000, fs=44100), rng.standard_normal(8000))
    x = 0.5 * x / np.max(np.abs(x))
    y0, y1 = convert(x, exact), convert(x, arb)
    assert y0.shape == y1.shape
    err = np.max(np.abs(y0 - y1)[500:-500]) / np.max(np.abs(y0))
    assert 20 * np.log10(err) < -spec.attenuation_db + 6


def test_arbitrary_route_converts_an_analytic_sine():
    spec = Spec(attenuation_db=100.0, ripple_db=0.05)
    d = design(spec, 44100, 44101)
    assert d.path == "arbitrary"
    x = analytic_sine(1000.0, 44100, 22050)
    y = convert(x, d)
    assert y.size == output_length(22050, 44101, 44100)
    ideal = analytic_sine(1000.0, 44101, y.size)
    mid = slice(y.size // 4, 3 * y.size // 4)
    assert np.max(np.abs(y[mid] - ideal[mid])) < 0.5 * (10 ** (0.05 / 20) - 1) + 1e-5


def test_arbitrary_path_is_block_size_invariant(rng):
    h = signal.firwin(8 * 64 + 1, 0.4 / 8) * 8
    conv = ArbitraryConverter(h, 7, 5, 8, channels=2)
    x = rng.standard_normal((300, 2))
    whole = conv.process_all(x)
    ones = run_blocks(conv, x, [1])
    assert np.max(np.abs(ones - whole)) <= 1e-12 * np.max(np.abs(whole))


def test_multistage_plan_converts_like_the_single_stage():
    spec = Spec(attenuation_db=100.0, ripple_db=0.05, stages="auto")
    plan = choose_plan(spec, 192000, 8000)
    assert plan.path == "multistage"
    x = analytic_sine(1000.0, 192000, 96000)
    y = convert(x, plan)
    assert y.size == output_length(96000, 1, 24)
    ideal = analytic_sine(1000.0, 8000, y.size)
    mid = slice(y.size // 4, 3 * y.size // 4)
    assert np.max(np.abs(y[mid] - ideal[mid])) < 0.5 * (10 ** (0.05 / 20) - 1) + 1e-5
    # block-size invariance through the cascade
    conv = make_converter(plan, channels=1)
    assert np.max(np.abs(run_blocks(conv, x[:, None], [997])[:, 0] - y)) < 1e-12
