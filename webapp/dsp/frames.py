"""Blocks of frames x channels as the core's streams take them: the channel count and the checks.

Both meters (:mod:`webapp.dsp.loudness`, :mod:`webapp.dsp.truepeak`), the limiter and the
quantiser take float blocks of frames x channels in a stream; these are their shared checks,
each naming the rule and the value.
"""

import numbers

import numpy as np

from .errors import ParameterError

__all__ = ["validate_channels", "as_frames"]


def validate_channels(channels):
    """The channel count as an int: a whole number from 1 to 64 (the meters, the limiter and
    the quantiser all take this many)."""
    if isinstance(channels, bool) or not isinstance(channels, numbers.Integral) or not 1 <= channels <= 64:
        raise ParameterError(f"channels must be an integer from 1 to 64, got {channels!r}", "channels")
    return int(channels)


def as_frames(block, channels):
    """Return ``block`` as a float frames x channels array after checking its shape and values."""
    x = np.asarray(block)
    if x.ndim == 1 and channels == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[1] != channels:
        raise ParameterError(
            f"block must be frames x channels with {channels} channel(s), got shape {x.shape}", "block")
    if not np.issubdtype(x.dtype, np.floating):
        raise ParameterError(f"block must hold floating-point samples, got dtype {x.dtype}", "block")
    # min and max are NaN when any sample is, and infinite when any sample is: two fast
    # reductions instead of a boolean array as large as the block
    if x.size and not (np.isfinite(x.min()) and np.isfinite(x.max())):
        raise ParameterError("block samples must be finite, got NaN or infinity", "block")
    return x
