"""The picture of a whole recording over time: min/max envelope at screen resolution, short-term
loudness, and where the samples reach full scale or the true peak goes over (no Flask here); and,
from the same read, the recording's meters.

One streaming pass in blocks (:func:`webapp.media.read_blocks`): memory stays flat whatever the
duration (the loudness meter keeps one number per 100 ms: 36 000 an hour). The meters are the
conversion pipeline's (:class:`webapp.pipeline.Meters`: BS.1770-4 loudness, whose meter also
gives the EBU Tech 3341 short-term curve, and the true-peak meter), on a thread of their own
beside the reader. The overs are searched frame by frame
(:class:`webapp.dsp.overs.TruePeakOvers`) in the same read, on the true-peak meter's thread,
from the chunk where the meter's running true peak first goes over the threshold: no frame
before it can be an over (the meter computes every value that can reach its running peak), so a
recording under the threshold is never searched.

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
from webapp.dsp.overs import FULL_SCALE, REACH_FRAMES, TruePeakOvers, full_scale_frames
from webapp.dsp.oversample import CHUNK_FRAMES
from webapp.pipeline import BLOCK_FRAMES, Meters

__all__ = ["overview", "overview_and_meters", "DEFAULT_COLUMNS", "MAX_COLUMNS",
           "OVER_THRESHOLD_DBTP"]

DEFAULT_COLUMNS = 1200
MAX_COLUMNS = 4000
#: True-peak overs are reported above this level: 0 dBTP, over full scale once reconstructed.
OVER_THRESHOLD_DBTP = 0.0


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
    """The overview's per-column figures, fed the blocks in order (min, max, full scale)."""

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

    def column_of(self, frames):
        return np.searchsorted(self.edges, frames, side="right") - 1

    def add(self, block):
        m, channels = block.shape
        if m == 0:
            return
        # a column's frames are one run of the interleaved samples, so one reduction gives its
        # extreme over all channels
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
        self.pos += m

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
    gives the short-term curve) and the true-peak meter. The overs are searched on the
    true-peak meter's thread from where its running reading first goes over the threshold
    (:class:`_PeakAndOvers`), and reported only when the meter reads over it.
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
    # the overs' markers fill as they are found (memory stays flat, however many there are),
    # and are shown only when the meter reads over the threshold
    overs = _Markers(grid.n)
    peak = _PeakAndOvers(meter.peak, info.channels, over_threshold_dbtp,
                         lambda frames: overs.add(frames, grid.column_of(frames)))
    # the meters run on threads of their own beside the reader and the columns (read_blocks
    # checks every sample, so they need not); one BLAS thread for the interpolator's small
    # products (more only fight over the cores)
    with one_blas_thread():
        with Stages() as stages:
            # loudness and true peak on a thread each (measured: 60 min FLAC 11.1 -> 10.4 s)
            parts = [functools.partial(meter.loud.process, checked=True)] \
                if meter.loud is not None else []
            metering = [stages.add(fn, f"rateferry-overview-meter-{i}")
                        for i, fn in enumerate(parts + [peak.take])]
            for block in prefetch(media.read_blocks(path, blocksize=BLOCK_FRAMES)):
                for stage in metering:
                    stage.submit(block)
                grid.add(block)
        meters = meter.result()
        reading = meters["true_peak_dbtp"]
        if reading is not None and reading > over_threshold_dbtp:
            peak.finish()
            grid.overs = overs
    figures = dict(
        rate_hz=rate, channels=info.channels, frames=frames, duration_s=frames / rate,
        columns=grid.n, **grid.figures(rate, meter.loud),
        full_scale_level=FULL_SCALE, over_threshold_dbtp=float(over_threshold_dbtp),
        seconds=time.perf_counter() - t0)
    return figures, meters


class _PeakAndOvers:
    """The true-peak meter fed block by block, and the search for the overs from where its
    running reading first goes over the threshold.

    While the meter's running peak stays under the threshold, no frame it has measured is an
    over (:meth:`webapp.dsp.truepeak.TruePeakMeter.running`): only the input a search would
    need from there is kept (the frames from REACH_FRAMES before the first frame not measured,
    a chunk or two). When it comes within 1e-4 of the threshold (the margin the interpolator
    gives its bounds: the meter's products, grouped otherwise, may differ from a search's in
    their last bits), a :class:`~webapp.dsp.overs.TruePeakOvers` starts on the frames not
    known to stay under, and is then fed every block. Its stream starts a chunk before the
    first frame not measured, on a chunk boundary of the file
    (:data:`~webapp.dsp.oversample.CHUNK_FRAMES`): from that frame on, its chunks are those of
    a search of the whole file, the same products of the same input, so the overs it finds
    there are the same to the bit.
    """

    def __init__(self, meter, channels, threshold_dbtp, found):
        self.meter = meter
        self.channels, self.threshold_dbtp = channels, threshold_dbtp
        self.level = 10.0 ** (threshold_dbtp / 20.0)
        self.kept, self.kept_at = [], 0            # the input from frame kept_at on
        self.finder = None
        self.found = found       # called with the overs as found: frame indices, ascending

    def take(self, block):
        """Measure ``block``; search it too once the reading has gone over."""
        measured, _ = self.meter.running()
        self.meter.process(block, checked=True)
        if self.finder is not None:
            self._keep(self.finder.process(block))
            return
        self.kept.append(block)
        now, peak = self.meter.running()
        if peak > self.level * (1.0 - 1e-4):
            self._start(measured)
        else:
            first = _search_start(now)
            while self.kept and self.kept_at + self.kept[0].shape[0] <= first:
                self.kept_at += self.kept.pop(0).shape[0]

    def finish(self):
        """Search the rest (the search ends here). When the reading went over only in the
        meter's last chunks (or the ringing after the last frame), those are searched now."""
        if self.finder is None:
            self._start(self.meter.running()[0])
        self._keep(self.finder.finish())

    def _start(self, measured):
        """Search from frame ``measured`` on (no frame before it is an over)."""
        first = _search_start(measured)
        self.finder = TruePeakOvers(channels=self.channels, threshold_dbtp=self.threshold_dbtp)
        self.offset, self.wanted = first, max(measured, 0)
        kept = np.concatenate(self.kept) if self.kept else np.zeros((0, self.channels))
        self.kept = []
        self._keep(self.finder.process(kept[first - self.kept_at:]))

    def _keep(self, frames):
        frames = frames + self.offset
        frames = frames[frames >= self.wanted]
        if frames.size:
            self.found(frames)
            self.wanted = frames[-1] + 1      # each frame once, in order, whatever comes


def _search_start(measured):
    """Where a search of the frames from ``measured`` (a chunk boundary of the meter's) on
    starts: at least REACH_FRAMES before it (the input their envelope depends on), on a chunk
    boundary of the file, so that the chunk from ``measured`` on has its whole input."""
    return max(0, (measured - REACH_FRAMES) // CHUNK_FRAMES * CHUNK_FRAMES)


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
