"""Where a signal goes over: samples at full scale and true-peak overs, frame by frame.

The true-peak meter (:class:`webapp.dsp.truepeak.TruePeakMeter`) reports the highest peak of a
whole programme; this module says *where* the peaks are, for a picture of the recording over
time. It uses the meter's own 16x interpolator (:class:`webapp.dsp.oversample.PeakInterpolator`,
the per-frame true-peak envelope), so a frame reported here over a threshold reads over it on
the meter too. :func:`over_floor` says where no over can be, so a search can skip the rest.

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
from .oversample import EDGE_FRAMES, PeakInterpolator, interpolator_design

__all__ = ["FULL_SCALE", "REACH_FRAMES", "full_scale_frames", "frame_peaks", "over_floor",
           "TruePeakOvers"]

FULL_SCALE = 32767 / 32768
#: A frame's true-peak envelope depends on the samples this many frames either side of it and
#: on no others (the interpolator's reach, :data:`webapp.dsp.oversample.EDGE_FRAMES`).
REACH_FRAMES = EDGE_FRAMES


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


def over_floor(threshold_dbtp):
    """The quietest sample that can take the true peak over ``threshold_dbtp`` (linear).

    Every point of the 16x reconstruction is at most ``fine_gain x max(1, sum |half|)`` (the
    two stages' gains, :func:`webapp.dsp.oversample.interpolator_design`) times the loudest
    |sample| within :data:`REACH_FRAMES` frames of it: where the samples stay below this
    floor, no frame within REACH_FRAMES of them can go over.
    """
    if not np.isfinite(threshold_dbtp) or not -60.0 <= threshold_dbtp <= 6.0:
        raise ParameterError(f"threshold_dbtp must be a number from -60 to 6 dBTP, got "
                             f"{threshold_dbtp!r}", "threshold_dbtp")
    d = interpolator_design()
    gain = d.fine_gain * max(1.0, float(np.abs(d.half).sum()))
    return 10.0 ** (threshold_dbtp / 20.0) / gain


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
    The interpolator's overs mode (:meth:`~webapp.dsp.oversample.PeakInterpolator.overs`)
    skips the chunks and the rows that cannot reach the threshold (exact) and keeps no
    envelope, so programme material well below full scale costs little more than reading it.
    Frames come back in order, a chunk (8192 frames) behind the input; :meth:`finish` gives
    the rest.
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
        self._frames = 0

    def _clip(self, frames):
        # ringing before the first frame or after the last belongs to the frame beside it
        return np.unique(np.clip(frames, 0, max(self._frames - 1, 0)))

    def process(self, block):
        """Frame indices (int64, ascending) of true-peak overs completed by this block."""
        x = np.asarray(block, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        if x.shape[1] != self._interp.channels:
            raise ParameterError(f"block must have {self._interp.channels} channels, got "
                                 f"{x.shape[1]}", "block")
        self._frames += x.shape[0]
        return self._clip(self._interp.overs(x, self.threshold))

    def finish(self):
        """The overs among the frames still held back; the stream is over after this."""
        return self._clip(self._interp.finish_overs(self.threshold))
