"""The picture of a whole recording over time: min/max envelope at screen resolution, short-term
loudness, and where the samples reach full scale or the true peak goes over (no Flask here); and,
from the same read, the recording's meters.

One streaming pass in blocks (:func:`webapp.media.read_blocks`): memory stays flat whatever the
duration (the loudness meter keeps one number per 100 ms: 36 000 an hour). The meters are the
conversion pipeline's (:class:`webapp.pipeline.Meters`: BS.1770-4 loudness, whose meter also
gives the EBU Tech 3341 short-term curve, and the true-peak meter), on a thread of their own
beside the reader. The overs need the true-peak envelope frame by frame
(:class:`webapp.dsp.overs.TruePeakOvers`), several times the meter's cost: they are looked for
only when the meter reads over the threshold, and then only in the stretches where a sample is
loud enough to take the true peak there (:func:`webapp.dsp.overs.over_floor`), read again.

Conventions
-----------
* The recording is cut into ``columns`` equal spans (column c holds frames
  ``c * frames // columns`` up to the next one); every series has one value per column.
* ``min`` and ``max`` are taken over all channels; ``short_term_lufs`` is the loudest 3 s window
  ending in the column, or the latest one before it when none ends there (windows hop 100 ms,
  columns are often shorter); None before the first 3 s and for rates below 8 kHz.
* Markers list the columns holding at least one full-scale frame or true-peak over, with the
  count and the time of the first one.
"""

import functools
import time

import numpy as np

from webapp import media
from webapp.threads import Stages, one_blas_thread, prefetch
from webapp.dsp.errors import ParameterError
from webapp.dsp.overs import FULL_SCALE, REACH_FRAMES, TruePeakOvers, full_scale_frames, \
    over_floor
from webapp.pipeline import BLOCK_FRAMES, Meters

__all__ = ["overview", "overview_and_meters", "DEFAULT_COLUMNS", "MAX_COLUMNS",
           "OVER_THRESHOLD_DBTP"]

DEFAULT_COLUMNS = 1200
MAX_COLUMNS = 4000
#: True-peak overs are reported above this level: 0 dBTP, over full scale once reconstructed.
OVER_THRESHOLD_DBTP = 0.0
#: The stretch whose loudest sample says whether the overs are looked for in it.
STRETCH_FRAMES = 8192


def _columns(value, frames):
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= MAX_COLUMNS:
        raise ParameterError(f"columns must be a whole number from 1 to {MAX_COLUMNS}, got "
                             f"{value!r}", "columns")
    return max(1, min(value, frames))


class _Markers:
    """Per-column count and first frame of some event."""

    def __init__(self, columns):
        self.count = np.zeros(columns, dtype=np.int64)
        self.first = np.full(columns, -1, dtype=np.int64)

    def add(self, frames, cols):
        if frames.size == 0:
            return
        np.add.at(self.count, cols, 1)
        fresh = self.first[cols] < 0
        # frames come in ascending order: the first occurrence per column is the earliest
        uniq, idx = np.unique(cols[fresh], return_index=True)
        self.first[uniq] = frames[fresh][idx]

    def figures(self, rate_hz):
        cols = np.flatnonzero(self.count)
        return dict(total=int(self.count.sum()), column=cols.tolist(),
                    time_s=(self.first[cols] / rate_hz).round(4).tolist(),
                    count=self.count[cols].tolist())


class _Columns:
    """The overview's per-column figures, fed the blocks in order (min, max, full scale), and
    the loudest sample of every stretch of :data:`STRETCH_FRAMES` frames."""

    def __init__(self, columns, frames):
        self.n = columns
        self.frames = frames
        # column c holds frames edges[c] .. edges[c + 1] - 1
        self.edges = (np.arange(columns + 1, dtype=np.int64) * frames) // columns
        self.low = np.full(columns, np.inf)
        self.high = np.full(columns, -np.inf)
        self.clipped = _Markers(columns)
        self.overs = _Markers(columns)
        self.pos = 0
        self._stretches = []

    def column_of(self, frames):
        return np.searchsorted(self.edges, frames, side="right") - 1

    def add(self, block):
        m, channels = block.shape
        if m == 0:
            return
        # a column's (a stretch's) frames are one run of the interleaved samples, so one
        # reduction gives its extreme over all channels
        flat = np.ascontiguousarray(block).reshape(-1)
        first, last = self.column_of([self.pos, self.pos + m - 1])
        cols = np.arange(first, last + 1)
        starts = np.maximum(self.edges[cols] - self.pos, 0) * channels
        lo = np.minimum.reduceat(flat, starts)
        hi = np.maximum.reduceat(flat, starts)
        if hi.max() >= FULL_SCALE or -lo.min() >= FULL_SCALE:   # else no frame is clipped
            at_fs = np.flatnonzero(full_scale_frames(block)) + self.pos
            self.clipped.add(at_fs, self.column_of(at_fs))
        self.low[cols] = np.minimum(self.low[cols], lo)
        self.high[cols] = np.maximum(self.high[cols], hi)
        k = np.arange(self.pos // STRETCH_FRAMES, (self.pos + m - 1) // STRETCH_FRAMES + 1)
        at = np.maximum(k * STRETCH_FRAMES - self.pos, 0) * channels
        peaks = np.maximum(np.maximum.reduceat(flat, at), -np.minimum.reduceat(flat, at))
        if self.pos % STRETCH_FRAMES:            # the first stretch began in the last block
            self._stretches[-1][-1] = max(self._stretches[-1][-1], peaks[0])
            peaks = peaks[1:]
        self._stretches.append(peaks)
        self.pos += m

    def stretch_peaks(self):
        """The loudest |sample| of every stretch of STRETCH_FRAMES frames (the last may be
        shorter), over all channels."""
        return np.concatenate(self._stretches) if self._stretches else np.zeros(0)

    def add_overs(self, frames):
        self.overs.add(frames, self.column_of(frames))

    def figures(self, rate, loud):
        return dict(time_s=(self.edges[:-1] / rate).round(4).tolist(),
                    min=np.round(self.low, 5).tolist(), max=np.round(self.high, 5).tolist(),
                    short_term_lufs=_short_term_columns(loud, self.edges, rate),
                    full_scale=self.clipped.figures(rate), overs=self.overs.figures(rate))


def overview(path, *, columns=DEFAULT_COLUMNS, over_threshold_dbtp=OVER_THRESHOLD_DBTP,
             probe=None):
    """Figures for the overview plot of the recording at ``path``.

    Parameters
    ----------
    path : str
    columns : int, optional
        Points across (the plot's width in pixels is a good choice); 1 to MAX_COLUMNS.
    over_threshold_dbtp : float, optional
    probe : media.Probe, optional

    Returns
    -------
    dict
        ``rate_hz``, ``channels``, ``frames``, ``duration_s``, ``columns``, ``time_s`` (start of
        each column), ``min``, ``max``, ``short_term_lufs``, ``full_scale`` and ``overs``
        (markers: ``total``, ``column``, ``time_s``, ``count``), ``full_scale_level``,
        ``over_threshold_dbtp``, ``seconds`` (time taken).

    Raises
    ------
    AudioFileError, ParameterError
    """
    figures, _ = overview_and_meters(path, columns=columns,
                                     over_threshold_dbtp=over_threshold_dbtp, probe=probe)
    return figures


def overview_and_meters(path, *, columns=DEFAULT_COLUMNS,
                        over_threshold_dbtp=OVER_THRESHOLD_DBTP, probe=None):
    """The overview and the recording's meters from one read of the file.

    The meters are :func:`webapp.pipeline.measure_file`'s, the pipeline's
    :class:`~webapp.pipeline.Meters` fed the same blocks: BS.1770 loudness (whose meter also
    gives the short-term curve) and the true-peak meter. The overs need the true-peak envelope
    frame by frame, which costs several times the meter: they are looked for only when the
    meter reads over the threshold, and then only where a sample is loud enough to take the
    true peak there (:func:`webapp.dsp.overs.over_floor`), reading those stretches again.
    :func:`overview` is this read without the meters.

    Returns
    -------
    (dict, dict)
        The overview (as :func:`overview`) and the meters (as
        :meth:`webapp.pipeline.Meters.result`).

    Raises
    ------
    AudioFileError, ParameterError
    """
    t0 = time.perf_counter()
    info = probe if probe is not None else media.probe(path)
    frames, rate = info.frames, info.rate_hz
    if frames == 0:
        raise ParameterError("the recording has no frames to draw", "recording_id")
    grid = _Columns(_columns(columns, frames), frames)
    meter = Meters(rate, info.channels)
    # the meters run on threads of their own beside the reader and the columns (read_blocks
    # checks every sample, so they need not); one BLAS thread for the interpolator's small
    # products (more only fight over the cores)
    with one_blas_thread():
        with Stages() as stages:
            # loudness and true peak on a thread each (measured: 60 min FLAC 11.1 -> 10.4 s)
            parts = [m for m in (meter.loud, meter.peak) if m is not None]
            metering = [stages.add(functools.partial(m.process, checked=True),
                                   f"rateferry-overview-meter-{i}") for i, m in enumerate(parts)]
            for block in prefetch(media.read_blocks(path, blocksize=BLOCK_FRAMES)):
                for stage in metering:
                    stage.submit(block)
                grid.add(block)
        meters = meter.result()
        reading = meters["true_peak_dbtp"]
        if reading is not None and reading > over_threshold_dbtp:
            grid.add_overs(_overs(path, info, grid.stretch_peaks(), over_threshold_dbtp))
    figures = dict(
        rate_hz=rate, channels=info.channels, frames=frames, duration_s=frames / rate,
        columns=grid.n, **grid.figures(rate, meter.loud),
        full_scale_level=FULL_SCALE, over_threshold_dbtp=float(over_threshold_dbtp),
        seconds=time.perf_counter() - t0)
    return figures, meters


def _overs(path, info, peaks, threshold_dbtp):
    """Frames whose true peak goes over ``threshold_dbtp``, searched in the stretches where a
    sample reaches :func:`over_floor` and :data:`REACH_FRAMES` around them (anywhere else the
    envelope stays under the threshold), each read again with that much context either side.
    """
    loud = np.flatnonzero(peaks >= over_floor(threshold_dbtp))
    if loud.size == 0:
        return np.zeros(0, dtype=np.int64)
    # stretches that can hold an over (a loud one and REACH_FRAMES either side), merged
    starts = np.maximum(loud * STRETCH_FRAMES - REACH_FRAMES, 0)
    stops = np.minimum((loud + 1) * STRETCH_FRAMES + REACH_FRAMES, info.frames)
    joined = np.flatnonzero(starts[1:] > stops[:-1] + 2 * REACH_FRAMES)
    regions = list(zip(starts[np.r_[0, joined + 1]], stops[np.r_[joined, loud.size - 1]]))
    # the search on a thread of its own, beside the reader (measured: a thread per group of
    # channels costs more in all than it saves)
    search = _RegionSearch(info.channels, threshold_dbtp)
    with Stages() as stages:
        searching = stages.add(search.take, "rateferry-overview-overs")
        for item in prefetch(_region_blocks(path, regions, info.frames)):
            searching.submit(item)
    return np.unique(np.concatenate(search.found))


def _region_blocks(path, regions, frames):
    """("start", (first frame read, region)), the region's frames with REACH_FRAMES either
    side in blocks, ("end", None), region by region, from one sequential read of the file
    (seeking a compressed file once per region costs more than decoding it all)."""
    spans = [(max(0, a - REACH_FRAMES), min(frames, b + REACH_FRAMES), a, b)
             for a, b in regions]             # apart by more than 2 REACH_FRAMES: disjoint
    k, at = 0, spans[0][0]
    for block in media.read_blocks(path, start=at, blocksize=BLOCK_FRAMES):
        end = at + block.shape[0]
        while k < len(spans) and spans[k][0] < end:
            first, stop, a, b = spans[k]
            if first >= at:
                yield "start", (first, a, b)
            yield "block", block[max(first - at, 0):min(stop, end) - at]
            if stop > end:
                break                         # the span goes on in the next block
            yield "end", None
            k += 1
        if k == len(spans):
            return
        at = end


class _RegionSearch:
    """The overs region by region: a fresh finder for each, fed the region with its context;
    the overs inside the region are kept (those at a file's first or last frame include the
    ringing beyond it, as documented)."""

    def __init__(self, channels, threshold_dbtp):
        self.channels, self.threshold_dbtp = channels, threshold_dbtp
        self.found = []

    def take(self, item):
        kind, value = item
        if kind == "start":
            self.offset, self.region = value[0], value[1:]
            self.finder = TruePeakOvers(channels=self.channels,
                                        threshold_dbtp=self.threshold_dbtp)
            self.parts = []
        elif kind == "block":
            self.parts.append(self.finder.process(value))
        else:
            self.parts.append(self.finder.finish())
            frames = np.concatenate(self.parts) + self.offset
            a, b = self.region
            self.found.append(frames[(frames >= a) & (frames < b)])


def _short_term_columns(loud, edges, rate):
    """The loudest short-term value ending in each column (None where there is none)."""
    n = edges.size - 1
    out = [None] * n
    if loud is None:
        return out
    values = loud.short_term_lufs()
    if values.size == 0:
        return out
    # window i ends at step i + 30, i.e. at frame (i + 30) * rate // 10
    ends = ((np.arange(values.size) + 30) * rate) // 10
    cols = np.clip(np.searchsorted(edges, ends, side="right") - 1, 0, n - 1)
    best = np.full(n, np.nan)
    has = np.zeros(n, dtype=bool)
    has[cols] = True
    best[has] = -np.inf
    np.maximum.at(best, cols, values)
    # carry the latest value into columns where no window ends
    last = np.maximum.accumulate(np.where(has, np.arange(n), -1))
    for c in np.flatnonzero(last >= 0):
        v = best[last[c]]
        out[c] = round(float(v), 2) if np.isfinite(v) else None
    return out
