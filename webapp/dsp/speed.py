"""Speed changes through the exact polyphase path.

A :class:`~webapp.dsp.rates.SpeedChange` plays the source p/q times as fast and delivers it at the
rate asked for; the filter is the ordinary design for the exact factor up/down, made on two
whole-Hz rates with that ratio (``SpeedChange.design_rates``). Edges given relative to the rates
(``passband_fraction``) carry over unchanged; edges given in Hz are meant at the output and are
scaled onto the design's rates.
"""

from dataclasses import replace

import numpy as np

from .design import design
from .errors import ParameterError
from .polyphase import convert
from .spec import Spec

__all__ = ["speed_design", "change_speed"]


def speed_design(spec, change):
    """The :class:`~webapp.dsp.design.Design` of ``change`` (a SpeedChange) for ``spec``."""
    spec = spec or Spec()
    fs_a, fs_b = change.design_rates()
    scale = float(change.design_scale)
    edges = {k: getattr(spec, k) * scale for k in ("passband_hz", "stopband_hz")
             if getattr(spec, k) is not None}
    d = design(replace(spec, **edges) if edges else spec, fs_a, fs_b)
    if (d.up, d.down) != (change.up, change.down):     # the design rates keep the exact ratio
        raise ParameterError(f"speed design route {d.up}/{d.down} differs from the exact factor "
                             f"{change.up}/{change.down}", "speed")
    return d


def change_speed(x, change, *, spec=None, designed=None, dtype=None):
    """Apply ``change`` to a whole frames x channels (or 1-D) signal.

    Returns ``change.output_length(len(x))`` frames at ``change.fs_out``: pitch and pace are
    multiplied by the speed factor p/q.
    """
    x = np.asarray(x)
    if x.ndim not in (1, 2) or x.shape[0] == 0:
        raise ParameterError(f"audio must be frames or frames x channels with frames > 0, got "
                             f"shape {x.shape}", "audio")
    d = designed if designed is not None else speed_design(spec, change)
    return convert(x, d, dtype=dtype)
