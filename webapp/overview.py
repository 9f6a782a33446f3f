"""The picture of a whole recording over time: min/max envelope at screen resolution, short-term
loudness, and where the samples reach full scale or the true peak goes over (no Flask here); and,
from the same read, the recording's meters.

One streaming pass in blocks (:func:`webapp.media.read_blocks`): memory stays flat whatever the
duration (the loudness meter keeps one number per 100 ms: 36 000 an hour). The meters are the
core's, as the conversion pipeline runs them (:class:`webapp.pipeline.Meters`): one
:class:`webapp.dsp.loudness.LoudnessMeter` (BS.1770-4 integrated loudness and loudness range, and
the EBU Tech 3341 short-term curve), one 16x scan per group of channels,
:class:`webapp.dsp.overs.TruePeakScan` (the true peak and the overs in one pass of the true-peak
meter's interpolator). The reader, the loudness meter and the scans run on their own threads.

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
from threadpoolctl import threadpool_limits

from webapp import media
from webapp.threads import Stages, prefetch
from webapp.dsp.errors import ParameterError
from webapp.dsp.overs import FULL_SCALE, TruePeakScan, full_scale_frames, joined_result
from webapp.pipeline import Meters

__all__ = ["overview", "overview_and_meters", "DEFAULT_COLUMNS", "MAX_COLUMNS",
           "OVER_THRESHOLD_DBTP"]

DEFAULT_COLUMNS = 1200
MAX_COLUMNS = 4000
#: True-peak overs are reported above this level: 0 dBTP, over full scale once reconstructed.
OVER_THRESHOLD_DBTP = 0.0
_BLOCK_FRAMES = 1 << 17


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
        m = block.shape[0]
        if m == 0:
            return
        first, last = self.column_of([self.pos, self.pos + m - 1])
        cols = np.arange(first, last + 1)
        # where each column touched by the block starts inside it; a column's frames are one
        # stretch of the interleaved samples, so one reduction gives its extreme over channels
        starts = np.maximum(self.edges[cols] - self.pos, 0) * block.shape[1]
        flat = np.ascontiguousarray(block).reshape(-1)
        lo = np.minimum.reduceat(flat, starts)
        hi = np.maximum.reduceat(flat, starts)
        if hi.max() >= FULL_SCALE or -lo.min() >= FULL_SCALE:   # else no frame is clipped
            at_fs = np.flatnonzero(full_scale_frames(block)) + self.pos
            self.clipped.add(at_fs, self.column_of(at_fs))
        self.low[cols] = np.minimum(self.low[cols], lo)
        self.high[cols] = np.maximum(self.high[cols], hi)
        self.pos += m

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

    The meters are those of :func:`webapp.pipeline.measure_file` (the pipeline's
    :class:`~webapp.pipeline.Meters`): the loudness from the one BS.1770 meter that also gives
    the short-term curve, the true peak from the 16x scan that also finds the overs
    (:class:`webapp.dsp.overs.TruePeakScan`; the same reading to the float32 products'
    rounding, about 1e-6 dB). :func:`overview` is this read without the meters.

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
    meter = Meters(rate, info.channels)        # the pipeline's figures, their note below 8 kHz
    scans = _ChannelScans(rate, info.channels, over_threshold_dbtp)
    meter.peak = scans                         # its true peak from the scans for the overs
    found = []
    # the scans (the largest part) and the loudness meter run on their own threads, beside
    # the reader and the columns; one BLAS thread for the interpolator's small products (more
    # only fight over the cores)
    with threadpool_limits(limits=1, user_api="blas"):
        with Stages() as stages:
            workers = [stages.add(lambda block, part=part: found.append(part.process(block)),
                                  f"rateferry-overview-overs-{i}")
                       for i, part in enumerate(scans.parts)]
            if meter.loud is not None:     # read_blocks checked every sample already
                workers.append(stages.add(functools.partial(meter.loud.process, checked=True),
                                          "rateferry-overview-loudness"))
            for block in prefetch(media.read_blocks(path, blocksize=_BLOCK_FRAMES)):
                for worker in workers:
                    worker.submit(block)
                grid.add(block)
        found.extend(part.finish() for part in scans.parts)
    grid.add_overs(np.unique(np.concatenate(found)))
    figures = dict(
        rate_hz=rate, channels=info.channels, frames=frames, duration_s=frames / rate,
        columns=grid.n, **grid.figures(rate, meter.loud),
        full_scale_level=FULL_SCALE, over_threshold_dbtp=float(over_threshold_dbtp),
        seconds=time.perf_counter() - t0)
    return figures, meter.result()


#: The true-peak scan runs on at most this many threads (the machine's two cores).
_SCAN_THREADS = 2


class _ChannelScans:
    """The true-peak scan of a recording in groups of channels, each group fed its own slice
    of every block (on its own thread); the figures of the whole (``result``)."""

    def __init__(self, rate, channels, threshold_dbtp):
        edges = np.linspace(0, channels, min(channels, _SCAN_THREADS) + 1).round().astype(int)
        self.parts = [_Slice(TruePeakScan(rate_hz=rate, channels=int(b - a),
                                          threshold_dbtp=threshold_dbtp), int(a), int(b))
                      for a, b in zip(edges[:-1], edges[1:])]

    def result(self):
        return joined_result([part.scan.result() for part in self.parts])


class _Slice:
    def __init__(self, scan, first, stop):
        self.scan, self.first, self.stop = scan, first, stop

    def process(self, block):
        return self.scan.process(block[:, self.first:self.stop])

    def finish(self):
        return self.scan.finish()


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
