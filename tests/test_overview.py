"""One read of a recording for both the overview and the meters (webapp.overview).

The separate computations are the references: :func:`webapp.overview.overview` for the picture
and :func:`webapp.pipeline.measure_file` for the meters (BS.1770 loudness and true peak, checked
against ITU-R BS.1770-4 and pyloudnorm in tests/dsp/test_loudness.py). The columns are checked
against their definition with plain numpy over the whole file read by soundfile (column c holds
frames c * frames // N up to the next column's first). The overs are checked against a search
of the whole file (webapp.dsp.overs.TruePeakOvers, itself checked against the true-peak meter and
the scipy.signal.upfirdn oracle in tests/dsp/test_overs.py).
"""

import math

import numpy as np
import pytest
import soundfile as sf
from threadpoolctl import threadpool_limits

from webapp import media
from webapp.dsp.overs import FULL_SCALE, TruePeakOvers
from webapp.overview import overview, overview_and_meters
from webapp.pipeline import measure_file as _measure_file


def measure_file(path, rate_hz, channels):
    """The reference meters, on one BLAS thread as the app runs them (the float32 products'
    last bits depend on how BLAS splits them between threads)."""
    with threadpool_limits(limits=1, user_api="blas"):
        return _measure_file(path, rate_hz, channels)


def _programme(rng, rate, seconds):
    """Stereo noise under a slow swell, a clipped stretch at 2 s and an fs/4 burst at 6 s whose
    crest (1.2, +1.6 dBTP) lies between its samples."""
    n = int(rate * seconds)
    swell = 0.2 + np.abs(np.sin(2 * np.pi * 0.3 * np.arange(n) / rate))
    x = rng.standard_normal((n, 2)) * 0.05 * swell[:, None]
    x[2 * rate:2 * rate + 3000] = 1.0
    k = np.arange(2000)
    x[6 * rate:6 * rate + k.size, 1] = 1.2 * np.sin(np.pi / 2 * k + np.pi / 4)
    return x


def _without_time(figures):
    return {k: v for k, v in figures.items() if k != "seconds"}


@pytest.mark.parametrize("columns", [997, 1200])
def test_one_read_equals_the_separate_overview_and_meters(tmp_audio, rng, columns):
    rate = 44100
    path = tmp_audio("programme.wav", _programme(rng, rate, 12.5), rate, subtype="FLOAT")
    info = media.probe(path)
    picture, meters = overview_and_meters(path, columns=columns, probe=info)
    alone = overview(path, columns=columns, probe=info)
    assert _without_time(picture) == _without_time(alone)
    assert picture["overs"]["total"] > 0 and picture["full_scale"]["total"] == 3000
    reference = measure_file(path, rate, 2)
    assert meters == reference
    # the steps into and out of the clipped stretch overshoot once band-limited (Gibbs,
    # physics): the programme reads above the burst's crest of 20 log10(1.2) = +1.6 dBTP
    assert meters["true_peak_dbtp"] > 20 * math.log10(1.2)


def _whole_file_overs(path, frames, columns, rate):
    """The overs markers from one search over the whole file (no stretch left out)."""
    finder = TruePeakOvers(channels=sf.info(path).channels)
    found = [finder.process(b) for b in media.read_blocks(path)] + [finder.finish()]
    over = np.unique(np.concatenate(found))
    edges = np.arange(columns + 1) * frames // columns
    cols = np.searchsorted(edges, over, side="right") - 1
    shown = sorted(set(cols.tolist()))
    return dict(total=int(over.size), column=shown,
                time_s=[round(over[cols == c][0] / rate, 4) for c in shown],
                count=[int((cols == c).sum()) for c in shown])


@pytest.mark.parametrize("swell, scale", [(0.05, 1.0), (0.3, 1.0), (0.05, 0.4)])
def test_overs_searched_where_samples_are_loud_are_those_of_the_whole_file(tmp_audio, rng,
                                                                           swell, scale):
    # quiet noise (0.05: a few stretches loud enough to search) or loud noise (0.3: nearly all
    # of them, in one region), with the clipped stretch and the burst of _programme; scaled by
    # 0.4 the programme stays under 0 dBTP: nothing is over, nothing is searched
    rate = 44100
    x = _programme(rng, rate, 12.5)
    x[:2 * rate] *= swell / 0.05
    x[2 * rate + 3000:6 * rate] *= swell / 0.05
    path = tmp_audio("programme.wav", scale * np.clip(x, -1, 1), rate, subtype="FLOAT")
    picture, meters = overview_and_meters(path, columns=800)
    assert picture["overs"] == _whole_file_overs(path, x.shape[0], 800, rate)
    assert (picture["overs"]["total"] > 0) == (meters["true_peak_dbtp"] > 0) == (scale == 1.0)


@pytest.mark.parametrize("channels", [3, 6])
def test_overs_of_many_channels_are_found_in_the_one_that_goes_over(tmp_audio, rng, channels):
    # the loudest channel is the last one, its crest (1.2) between samples
    rate = 48000
    x = rng.standard_normal((rate * 4, channels)) * 0.05
    k = np.arange(960)
    x[rate:rate + k.size, -1] = 1.2 * np.sin(np.pi / 2 * k + np.pi / 4)
    path = tmp_audio("surround.wav", x, rate, subtype="FLOAT")
    picture, meters = overview_and_meters(path, columns=400)
    reference = measure_file(path, rate, channels)
    assert meters == reference
    # physics: the band-limited burst reaches its crest (its abrupt ends ring higher still)
    assert meters["true_peak_dbtp"] > 20 * math.log10(1.2) - 0.05
    # the overs are the burst's, found in the last group: 1 s to 1.02 s
    overs = picture["overs"]
    assert overs["total"] > 0 and all(1.0 <= t <= 1.021 for t in overs["time_s"])


def test_columns_hold_the_frames_their_definition_gives(tmp_audio, rng):
    rate = 44100
    x = _programme(rng, rate, 12.5)
    path = tmp_audio("programme.wav", x, rate, subtype="FLOAT")
    data, _ = sf.read(path)
    n = 997                                   # 551250 frames: 552.9 per column, not whole
    picture, _ = overview_and_meters(path, columns=n)
    edges = np.arange(n + 1) * data.shape[0] // n
    low = [data[a:b].min() for a, b in zip(edges[:-1], edges[1:])]
    high = [data[a:b].max() for a, b in zip(edges[:-1], edges[1:])]
    np.testing.assert_allclose(picture["min"], np.round(low, 5), atol=0)
    np.testing.assert_allclose(picture["max"], np.round(high, 5), atol=0)
    np.testing.assert_allclose(picture["time_s"], np.round(edges[:-1] / rate, 4), atol=0)
    clipped = np.flatnonzero(np.abs(data).max(axis=1) >= FULL_SCALE)
    cols = np.searchsorted(edges, clipped, side="right") - 1
    found = picture["full_scale"]
    assert found["column"] == sorted(set(cols.tolist()))
    assert found["count"] == [int((cols == c).sum()) for c in found["column"]]
    assert found["time_s"] == [round(clipped[cols == c][0] / rate, 4) for c in found["column"]]


def test_below_the_loudness_meters_rate_the_one_read_keeps_the_note_and_the_peak(tmp_audio, rng):
    rate = 6000                               # under BS.1770's 8 kHz here: no loudness
    x = rng.standard_normal((rate * 5, 1)) * 0.1
    path = tmp_audio("low.wav", x, rate, subtype="FLOAT")
    picture, meters = overview_and_meters(path, columns=300)
    reference = measure_file(path, rate, 1)
    assert meters["integrated_lufs"] is None and meters["loudness_range_lu"] is None
    assert meters["analysis_note"] == reference["analysis_note"]
    assert meters["true_peak_dbtp"] == reference["true_peak_dbtp"]
    assert picture["short_term_lufs"] == [None] * 300
    assert _without_time(picture) == _without_time(overview(path, columns=300))
