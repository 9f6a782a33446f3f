"""Where a signal goes over: samples at full scale and true-peak overs, frame by frame.

The true-peak meter (:class:`webapp.dsp.loudness.TruePeakMeter`) reports the highest peak of a
whole programme; this module says *where* the peaks are, for a picture of the recording over
time. It uses the meter's own 16x interpolator (:class:`webapp.dsp.oversample.PeakInterpolator`,
the per-frame true-peak envelope), so a frame reported here over a threshold reads over it on
the meter too. :class:`TruePeakScan` gives both from one pass of the interpolator: the overs
and the meter's figures (a recording loaded in the page needs both).

Conventions
-----------
* Blocks are frames x channels, float, fed in order; positions are frame indices from the
  start of the stream.
* A frame is "at full scale" when any channel's |sample| reaches :data:`FULL_SCALE` (the largest
  16-bit code, 32767/32768: a clipped integer file sits there; common practice).
* A frame n is a true-peak over when the reconstructed signal exceeds the threshold (dBTP)
  somewhere in [n, n + 1). The ringing of an abrupt start or stop, outside the frames, counts
  for the first or the last frame.
"""

import numpy as np
from .errors import ParameterError
from .loudness import TruePeakResult, channel_peaks, true_peak_oversampling
from .oversample import EDGE_FRAMES, PeakInterpolator

__all__ = ["FULL_SCALE", "full_scale_frames", "frame_peaks", "TruePeakOvers", "TruePeakScan",
           "joined_result"]

FULL_SCALE = 32767 / 32768


def frame_peaks(block):
    """Largest |sample| of each frame over its channels (a loop over the few channels: numpy
    reduces a short last axis slowly)."""
    x = np.asarray(block)
    if x.ndim == 1:
        return np.abs(x)
    peak = np.abs(x[:, 0])
    for c in range(1, x.shape[1]):
        np.maximum(peak, np.abs(x[:, c]), out=peak)
    return peak


def full_scale_frames(block, peaks=None):
    """Boolean per frame: does any channel reach :data:`FULL_SCALE`? (``peaks``: the block's
    :func:`frame_peaks`, when the caller has them.)"""
    return (frame_peaks(block) if peaks is None else peaks) >= FULL_SCALE


class TruePeakOvers:
    """Streaming finder of the frames whose true peak exceeds ``threshold_dbtp``.

    Parameters
    ----------
    channels : int
    threshold_dbtp : float, optional
        Default 0 dBTP (over full scale once reconstructed).

    Notes
    -----
    The interpolator skips the rows that cannot reach the threshold (exact), so programme
    material well below full scale costs little more than reading it. Frames come back in
    order, a chunk (8192 frames) behind the input; :meth:`finish` gives the rest.
    """

    def __init__(self, *, channels, threshold_dbtp=0.0):
        if isinstance(channels, bool) or not isinstance(channels, int) or channels < 1:
            raise ParameterError(f"channels must be a whole number from 1, got {channels!r}",
                                 "channels")
        if not np.isfinite(threshold_dbtp) or not -60.0 <= threshold_dbtp <= 6.0:
            raise ParameterError(f"threshold_dbtp must be a number from -60 to 6 dBTP, got "
                                 f"{threshold_dbtp!r}", "threshold_dbtp")
        self.threshold = 10.0 ** (threshold_dbtp / 20.0)
        self._interp = PeakInterpolator(channels)
        self._next = -EDGE_FRAMES  # the frame of the next envelope value (ringing before 0 first)
        self._frames = 0

    def _overs(self, envelope):
        n = envelope.shape[0]
        first = self._next
        self._next += n
        if n == 0:
            return np.zeros(0, dtype=np.int64)
        level = _channel_max(envelope)
        frames = np.flatnonzero(level > self.threshold).astype(np.int64) + first
        # ringing before the first frame or after the last belongs to the frame beside it
        return np.unique(np.clip(frames, 0, max(self._frames - 1, 0)))

    def _floor(self):
        """Envelope values under this floor may be left uncomputed (reported as a bound under
        it): the overs only need the values above the threshold."""
        return self.threshold

    def _frames_of(self, block):
        x = np.asarray(block, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        if x.shape[1] != self._interp.channels:
            raise ParameterError(f"block must have {self._interp.channels} channels, got "
                                 f"{x.shape[1]}", "block")
        self._frames += x.shape[0]
        return x

    def process(self, block):
        """Frame indices (int64, ascending) of true-peak overs completed by this block."""
        x = self._frames_of(block)
        return self._overs(self._interp.process(x, self._floor()))

    def finish(self):
        """The overs among the frames still held back; the stream is over after this."""
        return self._overs(self._interp.finish(self._floor()))


class TruePeakScan(TruePeakOvers):
    """The overs of :class:`TruePeakOvers` and the figures of the true-peak meter, from one pass
    of the 16x interpolator.

    Parameters
    ----------
    rate_hz : int
        Sample rate (only reported; the interpolator is the same at every rate).
    channels : int
    threshold_dbtp : float, optional
        Default 0 dBTP.

    Notes
    -----
    Each block is interpolated with the floor ``min(running peak, threshold)`` per channel:
    every envelope value that could raise the running peak or go over the threshold is
    computed, the others are reported as a bound under the floor, so neither the overs nor the
    peak depend on them. :meth:`result` after :meth:`finish` gives the figures of
    :class:`webapp.dsp.loudness.TruePeakMeter` over the same blocks: the same interpolator and
    the same highest value, computed in differently shaped float32 products (the meter skips
    other rows), so the readings agree to the products' rounding (relative 1e-7, about 1e-6
    dB; see :mod:`webapp.dsp.oversample`).
    """

    def __init__(self, *, rate_hz, channels, threshold_dbtp=0.0):
        super().__init__(channels=channels, threshold_dbtp=threshold_dbtp)
        self.oversampling = true_peak_oversampling(rate_hz)
        self._true = np.zeros(self._interp.channels)
        self._sample = np.zeros(self._interp.channels)

    def _floor(self):
        return np.minimum(self._true, self.threshold)

    def _overs(self, envelope):
        if envelope.shape[0]:
            for c in range(envelope.shape[1]):
                self._true[c] = max(self._true[c], envelope[:, c].max())
        return super()._overs(envelope)

    def process(self, block):
        """Frame indices (int64, ascending) of true-peak overs completed by this block."""
        x = self._frames_of(block)
        if x.shape[0]:
            self._sample = np.maximum(self._sample, channel_peaks(x))
        return self._overs(self._interp.process(x, self._floor()))

    def result(self):
        """The :class:`~webapp.dsp.loudness.TruePeakResult` of every block (call after
        :meth:`finish`: the frames held back and the ring-out count too)."""
        true = np.maximum(self._true, self._sample)
        channel_true = tuple(_amplitude_db(v) for v in true)
        channel_sample = tuple(_amplitude_db(v) for v in self._sample)
        return TruePeakResult(true_peak_dbtp=max(channel_true),
                              sample_peak_dbfs=max(channel_sample),
                              channel_true_peak_dbtp=channel_true,
                              channel_sample_peak_dbfs=channel_sample,
                              oversampling=self.oversampling)


def joined_result(results):
    """One :class:`~webapp.dsp.loudness.TruePeakResult` of a programme whose channels were
    measured in groups (``results`` in channel order): the channel figures side by side, the
    largest of them for the programme."""
    true = tuple(v for r in results for v in r.channel_true_peak_dbtp)
    sample = tuple(v for r in results for v in r.channel_sample_peak_dbfs)
    return TruePeakResult(true_peak_dbtp=max(true), sample_peak_dbfs=max(sample),
                          channel_true_peak_dbtp=true, channel_sample_peak_dbfs=sample,
                          oversampling=results[0].oversampling)


def _channel_max(envelope):
    """Largest value of each frame over its channels (a loop: see :func:`frame_peaks`)."""
    level = envelope[:, 0].copy()
    for c in range(1, envelope.shape[1]):
        np.maximum(level, envelope[:, c], out=level)
    return level


def _amplitude_db(value):
    """20 log10 of an amplitude, -inf for zero (as the true-peak meter reports it)."""
    with np.errstate(divide="ignore"):
        return float(20.0 * np.log10(value))
