"""Channel layout of the delivered file: keep, fold down to mono, pick one channel, mono to stereo.

Conventions: data is frames x channels, float. Channel numbers are 1-based (1 = the first
channel, the left of a stereo pair).

Mono fold-down laws (N input channels, each weighted the same):

* ``"half"``: ``mono = (1/N) sum_i x_i`` (-6.02 dB per channel for stereo). A sound identical
  in both channels (centre-panned) keeps its level; uncorrelated channels of equal level come
  out 3 dB lower. Safe from clipping. The default.
* ``"equal_power"``: ``mono = (1/sqrt N) sum_i x_i`` (-3.01 dB per channel for stereo).
  Uncorrelated channels keep their power; a centre-panned sound rises by 3 dB (and may clip).
* ``"sum"``: ``mono = sum_i x_i`` (0 dB per channel): for channels that hold different material
  (two speakers on two microphones), each keeps its level; coherent material rises by 6 dB.

These are the usual pan-law choices (common practice). Loudness is measured on what is
delivered, after the layout.
"""

import math

import numpy as np

from .errors import ParameterError

__all__ = ["CHANNEL_LAYOUTS", "MONO_LAWS", "output_channels", "apply_layout"]

CHANNEL_LAYOUTS = ("keep", "mono", "pick", "stereo")
MONO_LAWS = ("half", "equal_power", "sum")


def output_channels(channels, layout, *, pick=1):
    """Channels delivered for ``channels`` in with ``layout``; raises if the layout can't apply."""
    if layout not in CHANNEL_LAYOUTS:
        raise ParameterError(f"channel_layout must be one of {', '.join(CHANNEL_LAYOUTS)}, got {layout!r}",
                             "channel_layout")
    if layout == "keep":
        return channels
    if layout in ("mono", "pick"):
        if layout == "pick" and not 1 <= pick <= channels:
            raise ParameterError(f"pick_channel must be from 1 to {channels} for a {channels}-channel "
                                 f"source, got {pick!r}", "pick_channel")
        return 1
    if channels > 2:
        raise ParameterError(f'channel_layout "stereo" makes stereo from mono (or keeps stereo); the '
                             f"source has {channels} channels", "channel_layout")
    return 2


def apply_layout(block, layout, *, law="half", pick=1):
    """Return ``block`` (frames x channels) in the delivered layout (a new array)."""
    x = np.asarray(block)
    if x.ndim != 2:
        raise ParameterError(f"block must be frames x channels, got shape {x.shape}", "block")
    if law not in MONO_LAWS:
        raise ParameterError(f"mono_law must be one of {', '.join(MONO_LAWS)}, got {law!r}", "mono_law")
    channels = x.shape[1]
    output_channels(channels, layout, pick=pick)
    if layout == "keep" or (layout == "stereo" and channels == 2):
        return x.copy()
    if layout == "pick":
        return x[:, pick - 1:pick].copy()
    if layout == "stereo":
        return np.repeat(x, 2, axis=1)
    scale = {"half": 1.0 / channels, "equal_power": 1.0 / math.sqrt(channels), "sum": 1.0}[law]
    return (x.sum(axis=1, keepdims=True) * scale).astype(x.dtype, copy=False)
