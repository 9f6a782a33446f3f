"""Where a signal goes over: samples at full scale and true-peak overs, frame by frame.

The true-peak meter (:class:`webapp.dsp.loudness.TruePeakMeter`) reports the highest peak of a
whole programme; this module says *where* the peaks are, for a picture of the recording over
time. It uses the same over-sampling (BS.1770-4 Annex 2 interpolator, factor from
:func:`webapp.dsp.loudness.true_peak_oversampling`), so a frame reported here over a threshold
reads over it on the meter too.

Conventions
-----------
* Blocks are frames x channels, float, fed in order; positions are frame indices from the
  start of the stream.
* A frame is "at full scale" when any channel's |sample| reaches :data:`FULL_SCALE` (the largest
  16-bit code, 32767/32768: a clipped integer file sits there; common practice).
* A frame is a true-peak over when any interpolated point in the sample period that ends at it,
  or the sample itself, exceeds the threshold (dBTP).
"""

import numpy as np
from scipy.ndimage import maximum_filter1d

from .errors import ParameterError
from .loudness import annex2_interpolator, true_peak_oversampling

__all__ = ["FULL_SCALE", "full_scale_frames", "frame_peaks", "TruePeakOvers"]

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
    rate_hz : int
    channels : int
    threshold_dbtp : float, optional
        Default 0 dBTP (over full scale after reconstruction).

    Notes
    -----
    Only frames that can exceed the threshold are interpolated: an output of phase p is
    sum_i h_p[i] x[n - i], so it is bounded by (max_p sum_i |h_p[i]|) * max |x[n-11..n]|; frames
    whose bound stays under the threshold are skipped (exact). Programme material mostly sits
    well below full scale, so the cost is close to one pass of ``abs`` and a running maximum.
    """

    def __init__(self, *, rate_hz, channels, threshold_dbtp=0.0):
        if not isinstance(channels, int) or channels < 1:
            raise ParameterError(f"channels must be a whole number from 1, got {channels!r}",
                                 "channels")
        if not np.isfinite(threshold_dbtp) or not -60.0 <= threshold_dbtp <= 6.0:
            raise ParameterError(f"threshold_dbtp must be a number from -60 to 6 dBTP, got "
                                 f"{threshold_dbtp!r}", "threshold_dbtp")
        phases = annex2_interpolator(true_peak_oversampling(rate_hz))
        self.channels = channels
        self.threshold = 10.0 ** (threshold_dbtp / 20.0)
        # taps reversed so that a window x[n-11..n] (oldest first) dots with them
        self._taps = phases[:, ::-1].T.copy() if phases.shape[0] else None   # 12 x P
        self._reach = float(np.abs(phases).sum(axis=1).max()) if phases.shape[0] else 1.0
        self._history = np.zeros((phases.shape[1] - 1 if phases.shape[0] else 0, channels))
        self._history_level = np.zeros(self._history.shape[0])
        self._frames = 0

    def process(self, block, peaks=None):
        """Frame indices (int64, ascending) of the block's true-peak overs (``peaks``: the
        block's :func:`frame_peaks`, when the caller has them)."""
        x = np.asarray(block, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        if x.shape[1] != self.channels:
            raise ParameterError(f"block must have {self.channels} channels, got {x.shape[1]}",
                                 "block")
        n = x.shape[0]
        start = self._frames
        self._frames += n
        if n == 0:
            return np.zeros(0, dtype=np.int64)
        level_x = frame_peaks(x) if peaks is None else peaks
        over = level_x > self.threshold                            # the samples themselves
        if self._taps is not None:
            h = self._history.shape[0]
            level = np.concatenate([self._history_level, level_x])
            data = np.concatenate([self._history, x])
            self._history = data[-h:].copy()
            self._history_level = level[-h:].copy()
            # running maximum over the 12 frames of each window: the filter's output at index
            # i covers i - 6 .. i + 5, so window k (frames k .. k + 11 of data) is at k + 6
            bound = maximum_filter1d(level, h + 1)[(h + 1) // 2:(h + 1) // 2 + n] * self._reach
            candidates = np.flatnonzero((bound > self.threshold) & ~over)
            if candidates.size:
                frames = np.lib.stride_tricks.sliding_window_view(data, h + 1, axis=0)
                peaks = np.abs(frames[candidates] @ self._taps).max(axis=(1, 2))
                over[candidates[peaks > self.threshold]] = True
        return np.flatnonzero(over).astype(np.int64) + start
