"""The 16x over-sampling interpolator behind the true-peak meter and the true-peak limiter.

Conventions: data is frames x channels, float, full scale 1.0; times are in input frames. The
interpolator reconstructs the signal at t = n + i/16 (i = 0 .. 15) and reports, for every input
frame n, the largest magnitude over [n, n + 1): the frame's *true-peak envelope*.

Design (ours; BS.1770-4 Annex 2 allows any interpolator of at least 4x that does the job)
------------------------------------------------------------------------------------------
Two stages, each a polyphase matrix product over strided windows:

1. 2x by a half-band interpolator: the even outputs are the samples themselves, the odd
   output (the point halfway between frames n and n + 1) is a 64-tap equiripple
   (Parks-McClellan, ``scipy.signal.remez``) filter with amplitude 1 +- 0.0024 (0.021 dB)
   from 0 to 0.475 fs. A half-band's image rejection equals its passband ripple: -52.5 dB.
2. 8x from the 2x stream by a Kaiser-windowed sinc (beta 7, 8 taps per phase, 7 phases; the
   eighth phase is the 2x sample itself): flat within 0.006 dB up to 0.2375 of the 2x rate
   (= 0.475 fs), about -60 dB on its images.

As one 16x FIR (:func:`prototype`) the response is flat within 0.022 dB from 0 to 0.475 fs
(22.8 kHz at 48 kHz, 20.9 kHz at 44.1 kHz, 3.8 kHz at 8 kHz), -6 dB at fs/2, images below
-54 dB; the grid of 16 points per frame adds a sampling-grid error of at most
``1 - cos(pi f / (16 fs))``, 0.038 dB at 0.475 fs. Content between 0.475 fs and fs/2 (hard
clipping puts some there) is read lower, as by any finite interpolator.

Cost: the first stage is 64 multiply-adds per frame and channel, the second 7 x 8 per 2x
sample, 112 per frame; with the grouping into products below about 95 + 210 BLAS
multiply-adds per frame in float32 (relative error about 1e-7, 1e-6 dB). Rows of the second
stage that cannot reach a given floor are skipped (see :class:`PeakInterpolator`).
"""

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import signal


__all__ = ["OVERSAMPLING", "PASSBAND_FRACTION", "CHUNK_FRAMES", "EDGE_FRAMES",
           "InterpolatorDesign", "interpolator_design", "prototype", "PeakInterpolator"]

OVERSAMPLING = 16
PASSBAND_FRACTION = 0.475      # of the sample rate: the band the interpolator is flat over
_HALF_TAPS = 64                # first stage: taps of the half-way point
_FINE_PHASES = 8               # second stage: points per 2x sample
_FINE_TAPS = 8                 # second stage: taps per phase
_FINE_BETA = 7.0               # Kaiser window of the second stage
_MID_GROUP = 32                # first stage: half-way points per row of its product
_FINE_GROUP = 8                # second stage: 2x samples per row of its product
#: Frames per chunk: the unit of work, at fixed positions of the stream (from -EDGE_FRAMES).
CHUNK_FRAMES = 8192


@dataclass(frozen=True)
class InterpolatorDesign:
    """The two stages of the 16x interpolator.

    Attributes
    ----------
    half : ndarray, shape (64,)
        Taps of the half-way point: ``x(n + 1/2) = sum_i half[i] x[n - 31 + i]``.
    fine : ndarray, shape (7, 8)
        Row p - 1 gives ``z(m + p/8) = sum_i fine[p - 1, i] z[m - 3 + i]`` on the 2x stream z.
    half_ripple : float
        Largest |amplitude - 1| of the first stage over 0 .. 0.475 fs (also its image level).
    fine_gain : float
        Largest sum of |taps| of a second-stage phase (the bound used to skip rows).
    """

    half: np.ndarray
    fine: np.ndarray
    half_ripple: float
    fine_gain: float


@lru_cache(maxsize=1)
def interpolator_design():
    """Return the :class:`InterpolatorDesign` (computed once)."""
    half = signal.remez(_HALF_TAPS, [0.0, PASSBAND_FRACTION], [1.0], fs=1.0)
    _, response = signal.freqz(half, worN=4096, fs=1.0)
    band = np.linspace(0, 0.5, 4096, endpoint=False) <= PASSBAND_FRACTION
    ripple = float(np.abs(np.abs(response[band]) - 1.0).max())
    offsets = np.arange(-_FINE_TAPS // 2 + 1, _FINE_TAPS // 2 + 1)
    fine = []
    for p in range(1, _FINE_PHASES):
        t = p / _FINE_PHASES - offsets
        u = np.clip(1.0 - (t / (_FINE_TAPS / 2)) ** 2, 0.0, None)
        fine.append(np.sinc(t) * np.i0(_FINE_BETA * np.sqrt(u)) / np.i0(_FINE_BETA))
    fine = np.array(fine)
    half.setflags(write=False)
    fine.setflags(write=False)
    return InterpolatorDesign(half=half, fine=fine, half_ripple=ripple,
                              fine_gain=float(np.abs(fine).sum(axis=1).max()))


def prototype():
    """The whole 16x interpolator as one FIR at 16 fs, with its delay in 16x samples.

    ``scipy.signal.upfirdn(h, x, 16)[delay + 16 n + i]`` is the reconstruction at ``n + i/16``
    (the plain oracle the tests compare the fast path with).
    """
    d = interpolator_design()
    # first stage as a half-band at 2 fs: centre tap 1, the half-way taps at odd offsets
    h1 = np.zeros(2 * _HALF_TAPS - 1)
    centre1 = _HALF_TAPS - 1
    h1[centre1] = 1.0
    for i, tap in enumerate(d.half):
        # tap i multiplies x[n - 31 + i] for the point n + 1/2: offset 2(n + 1/2) - 2(n - 31 + i)
        h1[centre1 + 2 * (_HALF_TAPS // 2 - 1 - i) + 1] = tap
    h2 = np.zeros(_FINE_PHASES * _FINE_TAPS + 1)
    centre2 = _FINE_PHASES * (_FINE_TAPS // 2)
    h2[centre2] = 1.0
    for p in range(1, _FINE_PHASES):
        for i, tap in enumerate(d.fine[p - 1]):
            # tap i multiplies z[m - 3 + i] for the point m + p/8
            h2[centre2 + p - _FINE_PHASES * (i - _FINE_TAPS // 2 + 1)] = tap
    up1 = np.zeros(h1.size * _FINE_PHASES - (_FINE_PHASES - 1))
    up1[::_FINE_PHASES] = h1
    h = np.convolve(up1, h2)
    return h, centre1 * _FINE_PHASES + centre2


def _band_matrix(phases, group):
    """(group + T - 1) x (P * group) matrix: a row window of ``group + T - 1`` inputs -> outputs.

    Column ``p * group + j`` is phase p of the j-th position of the row.
    """
    count, taps = phases.shape
    band = np.zeros((group + taps - 1, count, group))    # columns phase-major: p * group + j
    for j in range(group):
        band[j:j + taps, :, j] = phases.T
    return band.reshape(group + taps - 1, count * group).astype(np.float32)


def _windows(data, rows, width, step):
    """Strided rows x width windows of a channel-major array (channels, rows, width), read only."""
    item = data.strides[1]
    return np.lib.stride_tricks.as_strided(
        data, shape=(data.shape[0], rows, width), strides=(data.strides[0], step * item, item),
        writeable=False)


# frames of context a chunk needs: half-way points need 31 before and 32 after; the second
# stage needs 2x samples 3 before and 4 after each frame's two, i.e. 2 frames either side.
_CONTEXT = 2
_BEFORE = _HALF_TAPS // 2 - 1 + _CONTEXT
_AFTER = _HALF_TAPS // 2 + _CONTEXT + _MID_GROUP + _FINE_GROUP
# frames before 0 and after the end whose envelope the signal's edges reach (ring-in / out)
EDGE_FRAMES = _HALF_TAPS // 2 + _CONTEXT


class PeakInterpolator:
    """Streaming 16x true-peak envelope: for every frame, the largest |x(t)|, n <= t < n + 1.

    Parameters
    ----------
    channels : int
        Channels of every block.
    peak_only : bool, optional
        Return only the largest envelope value per channel of the frames completed by each call
        (a 1 x channels array, 0 x channels when none completed), which a meter needs and which
        costs less. Default is False.

    Notes
    -----
    The signal is taken as silent before the first frame and after the last. The envelope is
    reported from frame ``-EDGE_FRAMES`` (the reconstruction rings before an abrupt start) to
    frame ``frames + EDGE_FRAMES - 1`` (and after an abrupt stop), in order: ``process`` returns
    the frames it completes, ``finish`` the rest. Work is done in chunks of 8192 frames at fixed
    positions of the stream, so every frame's figures come from the same products whatever the
    split into blocks: the output is identical for any split.

    Given a ``floor``, a row of 4 frames whose bound (``fine_gain`` times the largest 2x sample
    in reach) stays under it is not computed: its frames report the bound, which is below the
    floor; a whole chunk whose bound (``chunk_gain`` times its largest input in reach) stays
    under it in every channel is not interpolated at all and reports that bound. Callers that
    only care about values reaching the floor (a meter with its running peak, a limiter with
    its ceiling) lose nothing. :meth:`overs` says only which frames exceed a level (a search
    for overs), from the rows computed for that floor.
    """

    def __init__(self, channels, *, peak_only=False):
        self.channels = int(channels)
        self.peak_only = bool(peak_only)
        d = interpolator_design()
        self._half = _band_matrix(d.half[None, :], _MID_GROUP)
        self._fine_t = np.ascontiguousarray(_band_matrix(d.fine, _FINE_GROUP).T)
        self._gain = d.fine_gain
        # any 16x output is at most this times the largest input in its reach: the second
        # stage's gain over 2x samples that are inputs or half-way points (sum |half| each)
        self._chunk_gain = d.fine_gain * max(1.0, float(np.abs(d.half).sum()))
        # input from frame self._start on; frames before 0 are silence
        self._buf = np.zeros((self.channels, _BEFORE + EDGE_FRAMES), dtype=np.float32)
        self._start = -EDGE_FRAMES - _BEFORE
        self._next = -EDGE_FRAMES          # first frame whose envelope is not yet reported
        self.frames_in = 0

    @property
    def covered(self):
        """The first frame whose envelope is not reported yet (the stream's frames count from
        0; the ringing before an abrupt start from ``-EDGE_FRAMES``)."""
        return self._next

    def process(self, block, floor=0.0, *, running=False):
        """Take frames x channels float ``block``; return the envelope of completed frames.

        Returns frames x channels float64, the frames after those returned before. With
        ``running``, each chunk's floor is also raised to the peak of the chunks before it in
        this call (a meter's running peak): pass the peak of everything returned before as
        ``floor`` and the skip pattern, hence every figure, is the same for any split.
        """
        return self._run(self._take(block), floor, running)

    def finish(self, floor=0.0, *, running=False):
        """Return the envelope of the remaining frames, through ``frames + EDGE_FRAMES - 1``.

        The stream is over after this call.
        """
        return self._run(self._end(), floor, running)

    def overs(self, block, level):
        """Take a block as :meth:`process` does; return the frames it completes whose envelope
        exceeds ``level`` in any channel (int64, ascending, from ``-EDGE_FRAMES`` on).

        The same figures as ``process(block, level)`` compared with ``level`` (the same
        products, skipping the same rows), without the envelope: a chunk whose bound
        (``chunk_gain`` times its largest |sample| in reach) stays under ``level`` costs one
        reduction, a chunk with no row that can reach it only the first stage.
        """
        return self._run_overs(self._take(block), level)

    def finish_overs(self, level):
        """The overs among the remaining frames (as :meth:`overs`), through
        ``frames + EDGE_FRAMES - 1``; the stream is over after this call."""
        return self._run_overs(self._end(), level)

    def _take(self, block):
        """Append ``block`` to the input; return how many frames are ready (whole chunks)."""
        x = np.asarray(block, dtype=np.float32)
        if x.shape[0]:
            self._buf = np.concatenate([self._buf, x.T], axis=1)
            self.frames_in += x.shape[0]
        # none ready yet while the input holds less than the context after the next frame
        ready = (self._start + self._buf.shape[1] - _AFTER - self._next) // CHUNK_FRAMES
        return max(ready, 0) * CHUNK_FRAMES

    def _end(self):
        """Pad the input with the silence after it; return the frames left to report."""
        end = self.frames_in + EDGE_FRAMES
        have = self._start + self._buf.shape[1]
        pad = end + _AFTER - have
        if pad > 0:
            self._buf = np.concatenate([self._buf, np.zeros((self.channels, pad), np.float32)], axis=1)
        return end - self._next

    def _window(self, offset, count):
        """The input a chunk of ``count`` frames from ``self._next + offset`` needs."""
        lo = self._next + offset - _BEFORE - self._start
        return self._buf[:, lo:lo + _BEFORE + count + _AFTER]

    def _advance(self, frames):
        """Mark ``frames`` more frames reported and drop the input no later chunk needs."""
        self._next += int(frames)
        cut = self._next - _BEFORE - self._start
        if cut > 0:
            self._buf = np.ascontiguousarray(self._buf[:, cut:])
            self._start += cut

    def _run(self, frames, floor, running):
        """Envelope (or peak) of ``frames`` frames from ``self._next``, chunk by chunk."""
        floor = np.broadcast_to(np.asarray(floor, dtype=np.float64), (self.channels,)).copy()
        if self.peak_only and running:
            return self._run_peaks(frames, floor)
        parts = []
        for a in range(0, frames, CHUNK_FRAMES):
            count = min(CHUNK_FRAMES, frames - a)
            window = self._window(a, count)
            # channels x count, or 1 x channels; a chunk whose bound stays under the floor in
            # every channel reports that bound for its frames (a limiter's chunks well under its
            # ceiling, most of programme) at the cost of one reduction
            bound = None if self.peak_only else self._chunk_bound(window, floor)
            part = self._chunk(window, count, floor) if bound is None else \
                np.repeat(bound[:, None], count, axis=1)
            parts.append(part)
            if running:
                np.maximum(floor, part[0] if self.peak_only else part.max(axis=1), out=floor)
        self._advance(frames)
        if self.peak_only:
            return np.max(parts, axis=0) if parts else np.zeros((0, self.channels))
        if not parts:
            return np.zeros((0, self.channels))
        return np.concatenate(parts, axis=1).T

    def _run_peaks(self, frames, floor):
        """The per-channel peak of ``frames`` frames from ``self._next`` (a meter's running
        peak): the loudest chunks first, so the floor is high early, and a chunk whose bound
        (``chunk_gain`` times its largest input in reach) stays under the floor is not
        interpolated at all: it reports its sample peak, which is below the floor too. The
        peak returned is the same as chunk by chunk in order (every value that can reach the
        floor is computed); only values under it may differ."""
        starts = np.arange(0, frames, CHUNK_FRAMES)
        counts = np.minimum(CHUNK_FRAMES, frames - starts)
        samples = np.empty((starts.size, self.channels))
        reach = np.empty((starts.size, self.channels))
        for k, (a, n) in enumerate(zip(starts, counts)):
            mags = np.abs(self._window(a, n))
            samples[k] = mags[:, _BEFORE:_BEFORE + n].max(axis=1)
            reach[k] = mags.max(axis=1)
        peak = np.zeros(self.channels)
        for k in np.argsort(-samples.max(axis=1), kind="stable"):
            a, n = int(starts[k]), int(counts[k])
            if np.all(self._chunk_gain * reach[k] < floor * (1.0 - 1e-4)):
                part = samples[k]
            else:
                part = self._chunk(self._window(a, n), n, floor)[0]
            np.maximum(floor, part, out=floor)
            np.maximum(peak, part, out=peak)
        self._advance(frames)
        return peak[None, :] if frames > 0 else np.zeros((0, self.channels))

    def _run_overs(self, frames, level):
        """Frames (from ``self._next``, ``frames`` of them) whose envelope exceeds ``level``."""
        level = float(level)
        # the least float32 value above level as a float64: the envelope is float32, and
        # numpy compares a float32 array with a float in float32
        cut = np.float32(level)
        if float(cut) <= level:
            cut = np.nextafter(cut, np.float32(np.inf))
        found = []
        for a in range(0, frames, CHUNK_FRAMES):
            count = min(CHUNK_FRAMES, frames - a)
            window = self._window(a, count)
            # the chunk's bound first: most chunks of programme stop here (every row's bound
            # is at most this one)
            if self._chunk_bound(window, level) is None:
                over = self._chunk_overs(window, count, level, cut)
                found.append(np.flatnonzero(over).astype(np.int64) + (self._next + a))
        self._advance(frames)
        return np.concatenate(found) if found else np.zeros(0, dtype=np.int64)

    def _chunk_bound(self, window, floor):
        """Per channel, ``chunk_gain`` times the largest |input| in reach of a chunk (float64)
        when that stays under the floor (one per channel, or one for all) in every channel,
        else None."""
        # abs of each extreme: a silent chunk's bound is +0.0 (a -0.0 would divide to -inf)
        reach = np.maximum(np.abs(window.max(axis=1)), np.abs(window.min(axis=1)))
        bound = self._chunk_gain * reach.astype(np.float64)
        return bound if np.all(bound < floor * (1.0 - 1e-4)) else None

    def _first_stage(self, window, count):
        """The half-way points ``mid`` and the inputs ``xs`` of the frames of ``window`` after
        its first _BEFORE (channels x span, from 2 frames before), and per frame the larger
        magnitude of the two (``pairs``); the rows of the second stage."""
        channels = self.channels
        per = _FINE_GROUP // 2                     # frames per second-stage row
        rows = -(-count // per)
        # first stage: half-way points of frames -2 .. rows * per + 1 (relative), rows of 32
        span = rows * per + 2 * _CONTEXT
        groups = -(-span // _MID_GROUP)
        wins = _windows(window, groups, _MID_GROUP + _HALF_TAPS - 1, _MID_GROUP)
        mid = (wins.reshape(channels * groups, -1) @ self._half).reshape(channels, -1)[:, :span]
        xs = window[:, _BEFORE - _CONTEXT:_BEFORE - _CONTEXT + span]
        pairs = np.abs(mid)
        np.maximum(pairs, np.abs(xs), out=pairs)    # per frame: max(|input|, |half-way point|)
        return mid, xs, pairs, rows

    def _bounds(self, pairs, rows):
        """The bound of every second-stage row (channels x rows): ``fine_gain`` times its
        largest 2x sample in reach."""
        per = _FINE_GROUP // 2
        # a row's inputs (2x samples 8 r - 3 .. 8 r + 11) lie within its frames and 2 either side
        quads = pairs[:, :(rows + 1) * per].reshape(self.channels, rows + 1, per)
        block = np.maximum(np.maximum(quads[..., 0], quads[..., 1]), np.maximum(quads[..., 2], quads[..., 3]))
        return self._gain * np.maximum(block[:, :-1], block[:, 1:])

    def _chunk(self, window, count, floor):
        """Envelope (channels x count) of the frames of ``window`` after its first _BEFORE.

        With ``self.peak_only``, the per-channel peak of those frames instead (1 x channels).
        """
        channels = self.channels
        per = _FINE_GROUP // 2                     # frames per second-stage row
        mid, xs, pairs, rows = self._first_stage(window, count)
        bound = self._bounds(pairs, rows)
        keep = bound >= floor[:, None] * (1.0 - 1e-4)
        channel, row = np.nonzero(keep)
        mostly = channel.size > channels * rows // 2   # then a gather costs more than it saves
        if self.peak_only and not mostly:
            # only the kept rows' windows of the 2x stream, gathered from where the inputs and
            # the half-way points are (the same values, without interleaving the whole chunk)
            peak = pairs[:, _CONTEXT:_CONTEXT + count].max(axis=1)
            if channel.size:
                out = np.abs(self._fine_t @ _gather(mid, xs, channel, row).T).max(axis=0)
                np.maximum.at(peak, channel, out)
            return peak.astype(np.float64)[None, :]
        wins = _fine_windows(mid, xs, rows)
        width = wins.shape[-1]
        if self.peak_only:
            peak = pairs[:, _CONTEXT:_CONTEXT + count].max(axis=1)
            out = (self._fine_t @ wins.reshape(channels * rows, width).T).reshape(-1, channels, rows)
            peak = np.maximum(peak, np.maximum(out.max(axis=(0, 2)), -out.min(axis=(0, 2))))
            return peak.astype(np.float64)[None, :]
        envelope = np.ascontiguousarray(pairs[:, _CONTEXT:_CONTEXT + rows * per])
        per_row = envelope.reshape(channels, rows, per)
        # rows not computed report their bound (a masked maximum: no gathered copies)
        np.maximum(per_row, np.where(keep, np.float32(0), bound.astype(np.float32))[..., None],
                   out=per_row)
        if mostly:
            peaks = self._fine_peaks(wins.reshape(channels * rows, width)).T
            np.maximum(per_row, peaks.reshape(channels, rows, per), out=per_row)
        elif channel.size:
            per_row[channel, row] = np.maximum(per_row[channel, row], self._fine_peaks(wins[channel, row]).T)
        return envelope[:, :count].astype(np.float64)

    def _chunk_overs(self, window, count, level, cut):
        """Per frame of ``window`` after its first _BEFORE (``count``): does the envelope of a
        channel exceed ``level``? The rows :meth:`_chunk` computes for the floor ``level``,
        through the same products; ``cut``: the least float32 above ``level``."""
        channels = self.channels
        per = _FINE_GROUP // 2
        mid, xs, pairs, rows = self._first_stage(window, count)
        bound = self._bounds(pairs, rows)
        over = np.zeros(rows * per, dtype=bool)
        np.any(pairs[:, _CONTEXT:_CONTEXT + rows * per] >= cut, axis=0, out=over)
        keep = bound >= np.float64(level) * (1.0 - 1e-4)     # in float64, as _chunk's floor
        channel, row = np.nonzero(keep)
        if channel.size > channels * rows // 2:        # as in _chunk: every row, one product
            wins = _fine_windows(mid, xs, rows)
            peaks = self._fine_peaks(wins.reshape(channels * rows, wins.shape[-1]))
            over |= (peaks >= cut).reshape(per, channels, rows).any(axis=1).T.reshape(-1)
        elif channel.size:
            hit = (self._fine_peaks(_gather(mid, xs, channel, row)) >= cut).T   # kept rows x per
            r, j = np.nonzero(hit)
            over[row[r] * per + j] = True
        return over[:count]

    def _fine_peaks(self, wins):
        """Per-frame peak (frames per row x rows) of the second stage's outputs of ``wins``."""
        out = self._fine_t @ wins.T                 # (7 phases * 8 positions) x rows
        np.abs(out, out=out)
        peak = np.maximum.reduce(out.reshape(_FINE_PHASES - 1, _FINE_GROUP, -1), axis=0)
        return np.maximum(peak[0::2], peak[1::2])


def _fine_windows(mid, xs, rows):
    """The second stage's input windows of every row (channels x rows x 15, a strided view of
    the 2x stream: inputs and half-way points interleaved)."""
    channels, span = xs.shape
    z = np.empty((channels, 2 * span), dtype=np.float32)
    z[:, 0::2] = xs
    z[:, 1::2] = mid
    width = _FINE_GROUP + _FINE_TAPS - 1
    return _windows(z[:, 2 * _CONTEXT - (_FINE_TAPS // 2 - 1):], rows, width, _FINE_GROUP)


def _gather(mid, xs, channel, row):
    """The second stage's input windows of the rows ``(channel, row)`` only (rows x 15),
    gathered from where the inputs and the half-way points are: the values of
    :func:`_fine_windows`, without interleaving the whole chunk."""
    at = (2 * _CONTEXT - (_FINE_TAPS // 2 - 1) + _FINE_GROUP * row)[:, None] \
        + np.arange(_FINE_GROUP + _FINE_TAPS - 1)
    half, odd = at >> 1, (at & 1).astype(bool)
    lanes = channel[:, None]
    return np.where(odd, mid[lanes, half], xs[lanes, half])
