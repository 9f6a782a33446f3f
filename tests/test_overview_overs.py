"""The overs of the one read (webapp.overview), searched from where the true-peak meter's
running reading first goes over the threshold, against a plain search of the whole file.

Reference: the per-frame true-peak envelope of the whole file with nothing skipped
(webapp.dsp.oversample.PeakInterpolator with a floor of 0, itself checked against the
scipy.signal.upfirdn oracle in tests/dsp/test_overs.py): a frame is an over when the envelope
exceeds the threshold there, the ringing before the first frame and after the last counting
for the frame beside it. The files are real ones written through soundfile (32-bit float WAV,
24-bit FLAC); the meters must stay those of webapp.pipeline.measure_file to the bit.
"""

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from webapp import media
from webapp.dsp.truepeak import TruePeakMeter
from webapp.dsp.overs import TruePeakOvers
from webapp.dsp.oversample import CHUNK_FRAMES, EDGE_FRAMES, PeakInterpolator
from webapp.overview import _PeakAndOvers, overview_and_meters
from webapp.pipeline import BLOCK_FRAMES, measure_file

RATE = 44100


def _plain_overs(x, threshold_dbtp=0.0):
    """Frames whose envelope (every row computed: floor 0) exceeds the threshold."""
    interp = PeakInterpolator(x.shape[1])
    envelope = np.concatenate([interp.process(x, 0.0), interp.finish(0.0)])
    assert envelope.shape[0] == x.shape[0] + 2 * EDGE_FRAMES
    over = np.flatnonzero(envelope.max(axis=1) > 10 ** (threshold_dbtp / 20)) - EDGE_FRAMES
    return np.unique(np.clip(over, 0, x.shape[0] - 1))


def _stage_overs(x, block, threshold_dbtp=0.0):
    """The overs the one read's true-peak stage finds in ``x`` fed in blocks of ``block``."""
    found = []
    stage = _PeakAndOvers(TruePeakMeter(rate_hz=RATE, channels=x.shape[1]), x.shape[1],
                          threshold_dbtp, found.append)
    for a in range(0, x.shape[0], block):
        stage.take(x[a:a + block])
    stage.finish()
    frames = np.concatenate(found)
    assert np.all(np.diff(frames) > 0)
    return frames


def _markers(frames, n, columns):
    """The overview's markers of ``frames`` (column c holds frames c * n // columns on)."""
    edges = np.arange(columns + 1) * n // columns
    cols = np.searchsorted(edges, frames, side="right") - 1
    shown = sorted(set(cols.tolist()))
    return dict(total=int(frames.size), column=shown,
                time_s=[round(frames[cols == c][0] / RATE, 4) for c in shown],
                count=[int((cols == c).sum()) for c in shown])


def _burst(x, at, frames=24, channel=0, crest=1.2):
    """A burst at fs/4 whose crest (1.2: +1.6 dBTP) lies between its samples (0.85)."""
    k = np.arange(min(frames, x.shape[0] - at))
    x[at:at + k.size, channel] = crest * np.sin(np.pi / 2 * k + np.pi / 4)


# where the overs are: the first frames (ringing before the start), across a read block's
# edge, across a chunk edge of the interpolator (chunks start at -EDGE_FRAMES + k * CHUNK),
# the first one late in the file (the search starts there), and the last frames (ringing after
# the end)
PLACES = {
    "start": [0],
    "block edge": [BLOCK_FRAMES - 12],
    "chunk edge": [5 * CHUNK_FRAMES - EDGE_FRAMES - 10],
    "late first": [3 * BLOCK_FRAMES + 5000, 3 * BLOCK_FRAMES + 5000 + 2 * CHUNK_FRAMES - 40],
    "end": [-20],
    "everywhere": [0, 700, BLOCK_FRAMES - 12, 5 * CHUNK_FRAMES - EDGE_FRAMES - 10,
                   2 * BLOCK_FRAMES + 3, 3 * BLOCK_FRAMES + 5000, -20],
}


def _programme(rng, places, frames=4 * BLOCK_FRAMES + 7777, loud=False):
    """Quiet stereo noise (never over) with bursts at ``places``; ``loud``: a stretch of loud
    noise too (most rows of its chunks computed: the search's full products)."""
    x = rng.standard_normal((frames, 2)) * 0.05
    if loud:
        x[150000:170000] = np.clip(rng.standard_normal((20000, 2)) * 0.3, -1, 1)
    for i, at in enumerate(places):
        _burst(x, at % frames, channel=i % 2)
    return x


@pytest.mark.parametrize("place", sorted(PLACES))
def test_overs_of_the_one_read_are_those_of_the_whole_file(tmp_audio, rng, place):
    x = _programme(rng, PLACES[place])
    path = tmp_audio("programme.wav", x, RATE, subtype="FLOAT")
    expected = _plain_overs(x)
    assert expected.size > 0
    for columns in (4000, 997):
        picture, meters = overview_and_meters(path, columns=columns)
        assert picture["overs"] == _markers(expected, x.shape[0], columns)
    with threadpool_limits(limits=1, user_api="blas"):   # as the app runs the meters
        assert meters == measure_file(path, RATE, 2)


def test_overs_of_a_flac_file_with_loud_stretches_are_those_of_the_whole_file(tmp_audio, rng):
    x = _programme(rng, PLACES["everywhere"], loud=True)
    x = np.clip(x, -1, 1)
    path = tmp_audio("programme.flac", x, RATE, subtype="PCM_24")
    data = np.concatenate(list(media.read_blocks(path)))      # as soundfile decodes it
    expected = _plain_overs(data)
    picture, meters = overview_and_meters(path, columns=4000)
    assert picture["overs"] == _markers(expected, data.shape[0], 4000)
    assert picture["overs"]["total"] > 100                   # the loud noise goes over too
    with threadpool_limits(limits=1, user_api="blas"):
        assert meters == measure_file(path, RATE, 2)


def test_a_reading_over_only_in_the_last_frames_is_searched_after_the_read(tmp_audio, rng):
    # the burst sits in the frames the meter measures only at its finish (it works a chunk
    # behind its input): the running reading stays under 0 dBTP through the whole read
    x = _programme(rng, [], frames=10 * CHUNK_FRAMES + 5000)
    _burst(x, x.shape[0] - 3000, frames=200)
    meter = TruePeakMeter(rate_hz=RATE, channels=2)
    for a in range(0, x.shape[0], BLOCK_FRAMES):
        meter.process(x[a:a + BLOCK_FRAMES])
    assert meter.running()[1] <= 1.0 < 10 ** (meter.result().true_peak_dbtp / 20)
    path = tmp_audio("late.wav", x, RATE, subtype="FLOAT")
    picture, _ = overview_and_meters(path, columns=4000)
    expected = _plain_overs(x)
    assert expected.size > 0 and expected.min() >= x.shape[0] - 3000 - EDGE_FRAMES
    assert picture["overs"] == _markers(expected, x.shape[0], 4000)


def test_a_programme_under_the_threshold_has_no_overs_and_no_search(tmp_audio, rng):
    x = 0.6 * _programme(rng, PLACES["everywhere"])          # crest 0.72: -2.9 dBTP
    path = tmp_audio("quiet.wav", x, RATE, subtype="FLOAT")
    picture, meters = overview_and_meters(path, columns=500)
    assert _plain_overs(x).size == 0
    assert picture["overs"] == dict(total=0, column=[], time_s=[], count=[])
    assert meters["true_peak_dbtp"] < 0.0


@pytest.mark.parametrize("block", [BLOCK_FRAMES, 10000, 777])
@pytest.mark.parametrize("threshold_dbtp", [0.0, -2.0])
def test_the_search_from_the_meters_crossing_finds_every_over_for_any_blocks(rng, block,
                                                                            threshold_dbtp):
    # frame by frame, fed as the read feeds it (any block size), against the whole-file
    # envelope; at -2 dBTP the loud noise goes over early, at 0 dBTP the first burst is late
    x = _programme(rng, PLACES["late first"] + [-20], loud=True)
    x[:140000] *= 0.5
    found = _stage_overs(x, block, threshold_dbtp)
    expected = _plain_overs(x, threshold_dbtp)
    assert expected.size > 0 and expected.min() > 100000
    np.testing.assert_array_equal(found, expected)
    # and the search of the whole file, whose chunks the stage's are from where it starts
    whole = TruePeakOvers(channels=2, threshold_dbtp=threshold_dbtp)
    np.testing.assert_array_equal(found, np.concatenate([whole.process(x), whole.finish()]))


@pytest.mark.parametrize("block", [BLOCK_FRAMES, 10000])
@pytest.mark.parametrize("shift", [-3, 0, 5, 20, 33, 40, 90])
def test_the_first_overs_just_after_the_measured_frames_see_the_input_before_them(rng, block,
                                                                                 shift):
    # the meter has measured the frames before ``edge`` after the first block; a burst just
    # under 0 dBTP (0.99, faded in) runs past the edge up to ``edge + shift`` and goes on at
    # 1.2: the first overs lie at the edge and after it; the frames between stay under only
    # with the burst before the edge in view (started at the edge, it would ring over 1.0
    # in the next two frames: a search must see the input before where it reports)
    meter = TruePeakMeter(rate_hz=RATE, channels=2)
    meter.process(np.zeros((block, 2)))
    edge = meter.running()[0]
    x = rng.standard_normal((3 * block, 2)) * 0.02
    n = np.arange(edge - 400, edge + shift + 60)
    burst = np.sin(np.pi / 2 * (n - edge) + 0.3) * np.where(n < edge + shift, 0.99, 1.2)
    burst[:200] *= np.sin(np.pi / 2 * np.arange(200) / 200) ** 2
    x[n, 1] = burst
    expected = _plain_overs(x)
    assert expected.size > 0 and edge - EDGE_FRAMES <= expected.min() <= edge + shift + 1
    np.testing.assert_array_equal(_stage_overs(x, block), expected)
