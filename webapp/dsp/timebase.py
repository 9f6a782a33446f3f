"""A time base: how a track's clock maps onto a reference's, and the correction that removes it.

Conventions
-----------
* Model: a track of the same event as a reference, with ``e = drift_ppm * 1e-6``, satisfies
      t_track = offset + (1 + e) * t_ref
  (seconds by each file's nominal rate). ``drift_ppm`` is positive when the track's clock runs
  fast (it takes more samples per true second, so its sounds come later and later); ``offset_ms``
  is the track time at reference time 0, positive when the track's content comes late (its
  first word sits later in its file than in the reference).
* The correction converts the track by the real ratio ``fs_out / (fs_in * (1 + e))``: output
  frame n (at the reference rate) is read at track position ``start + n * step`` with
  ``start = offset * fs_in`` and ``step = fs_in * (1 + e) / fs_out``. A positive start trims the
  track's head, a negative one pads silence; the output has the reference's length.
* Positions are exact rationals (see ArbitraryConverter): the float fields convert exactly to
  fractions, so the same fields give the same bytes on a re-run.
"""

from dataclasses import asdict, dataclass, replace
from fractions import Fraction
import math

import numpy as np

from .design import design
from .errors import ParameterError
from .polyphase import _MAX_DENOMINATOR, make_converter
from .rates import validate_rate
from .spec import Spec

__all__ = ["TimeBase", "MAX_DRIFT_PPM", "timebase_design", "timebase_converter", "correct_drift"]

# Consumer audio clocks sit within about +-50 ppm (common practice); 10 000 ppm (1 %) is far
# beyond any clock and keeps a mistaken value from silently stretching a file.
MAX_DRIFT_PPM = 10_000.0


@dataclass(frozen=True)
class TimeBase:
    """How a track's clock maps onto a reference's (see the module conventions).

    Parameters
    ----------
    fs_in : int
        The track's nominal rate in Hz.
    fs_out : int
        The reference's rate in Hz (the corrected track's rate).
    drift_ppm : float
        Positive when the track's clock runs fast.
    offset_ms : float
        Track time at reference time 0; positive when the track's content comes late.
    frames_out : int or None
        The corrected length (the reference's); None: as far as the track reaches.
    """

    fs_in: int
    fs_out: int
    drift_ppm: float
    offset_ms: float
    frames_out: int | None = None

    def __post_init__(self):
        object.__setattr__(self, "fs_in", validate_rate(self.fs_in, field="fs_in"))
        object.__setattr__(self, "fs_out", validate_rate(self.fs_out, field="fs_out"))
        for name, limit in (("drift_ppm", MAX_DRIFT_PPM), ("offset_ms", 1e9)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) \
                    or not math.isfinite(value) or abs(value) > limit:
                raise ParameterError(f"{name} must be a finite number within +-{limit:g}, "
                                     f"got {value!r}", name)
            object.__setattr__(self, name, float(value))
        if self.frames_out is not None:
            if isinstance(self.frames_out, bool) or int(self.frames_out) != self.frames_out \
                    or self.frames_out < 0:
                raise ParameterError(f"frames_out must be a whole number of frames >= 0, got "
                                     f"{self.frames_out!r}", "frames_out")
            object.__setattr__(self, "frames_out", int(self.frames_out))

    @property
    def step(self):
        """Track frames per output frame, an exact fraction with denominator below 2**40.

        The exact value fs_in (1 + e) / fs_out has a huge denominator (a float's binary
        fraction times 1e6); the closest fraction with a denominator below 2**40 is within
        1e-12 of it, under a thousandth of a frame after a billion frames.
        """
        exact = Fraction(self.fs_in, self.fs_out) * (1 + Fraction(self.drift_ppm) / 10**6)
        return exact.limit_denominator(_MAX_DENOMINATOR - 1)

    @property
    def up(self):
        return self.step.denominator

    @property
    def down(self):
        return self.step.numerator

    @property
    def ratio(self):
        """The conversion ratio, output frames per track frame (a real number)."""
        return self.up / self.down

    @property
    def start_frames(self):
        """Track position of output frame 0 (exact, may be negative or fractional)."""
        return Fraction(self.offset_ms) * self.fs_in / 1000

    def output_length(self, frames_in):
        """Frames the correction delivers for a track of ``frames_in`` frames."""
        if self.frames_out is not None:
            return self.frames_out
        num = int(frames_in) * self.up - round(self.start_frames * self.up)
        return max(0, -(-num // self.down))

    def to_dict(self):
        return asdict(self)

    @classmethod
    def from_dict(cls, data):
        names = {"fs_in", "fs_out", "drift_ppm", "offset_ms", "frames_out"}
        unknown = sorted(set(data) - names)
        if unknown:
            raise ParameterError(f"unknown time base field {unknown[0]!r}; known: "
                                 f"{', '.join(sorted(names))}", unknown[0])
        missing = sorted(names - {"frames_out"} - set(data))
        if missing:
            raise ParameterError(f"a time base needs {', '.join(missing)}", missing[0])
        return cls(**data)


def timebase_design(spec, time_base):
    """The arbitrary-path :class:`~webapp.dsp.design.Design` for ``time_base``'s nominal rates.

    The mask is the one of the nominal route fs_in -> fs_out; the real ratio differs from it by
    the drift (parts per million), which moves the stopband edge by as little: what lies within
    those few ppm below the lower Nyquist aliases into the transition band, not the passband.
    """
    d = design(spec or Spec(), time_base.fs_in, time_base.fs_out, max_bank_taps=0)
    return replace(d, path_reason=(
        f"a real ratio ({time_base.drift_ppm:+.4f} ppm off {time_base.fs_in} -> "
        f"{time_base.fs_out} Hz) needs bandlimited interpolation: a {d.phases}-phase table "
        "with linear interpolation between phases"))


def timebase_converter(time_base, *, channels=1, spec=None, dtype=None, designed=None):
    """A streaming converter that applies ``time_base`` (block-size invariant)."""
    d = designed if designed is not None else timebase_design(spec, time_base)
    return make_converter(d, channels=channels, dtype=dtype, time_base=time_base)


def correct_drift(track, time_base, *, spec=None, dtype=None, designed=None,
                  block_frames=1 << 16):
    """Bring ``track`` onto the reference's clock, rate, start and length.

    Parameters
    ----------
    track : ndarray
        frames or frames x channels at ``time_base.fs_in``.
    time_base : TimeBase
    spec : Spec, optional
        The mask of the conversion; default ``Spec()``.
    designed : Design, optional
        A design from :func:`timebase_design` to reuse.
    block_frames : int, optional
        Feed size; the result does not depend on it.

    Returns
    -------
    ndarray
        ``time_base.output_length(len(track))`` frames at ``time_base.fs_out``, same layout.
    """
    x = np.asarray(track)
    if x.ndim not in (1, 2) or x.shape[0] == 0:
        raise ParameterError(f"track must be frames or frames x channels with frames > 0, got "
                             f"shape {x.shape}", "track")
    flat = x.ndim == 1
    x2 = x[:, None] if flat else x
    conv = timebase_converter(time_base, channels=x2.shape[1], spec=spec, dtype=dtype,
                              designed=designed)
    parts = [conv.process(x2[i:i + block_frames]) for i in range(0, x2.shape[0], block_frames)]
    parts.append(conv.flush())
    y = np.concatenate(parts, axis=0)
    return y[:, 0] if flat else y
