"""Exact conversion factors between two integer sample rates.

Conventions: rates are integers in Hz; a route converts ``fs_in`` to ``fs_out`` by the reduced
rational factor ``up/down`` (L/M), with ``fs_out = fs_in * up / down`` exactly.
"""

from dataclasses import dataclass
from fractions import Fraction
from math import gcd
import re

from .errors import ParameterError
from .numbers import whole_number

__all__ = ["MIN_RATE_HZ", "MAX_RATE_HZ", "Route", "validate_rate", "route", "SpeedChange",
           "speed_change", "parse_speed", "parse_rate", "true_rate_change", "MAX_SPEED_TERM"]

MIN_RATE_HZ = 1000
MAX_RATE_HZ = 768000


@dataclass(frozen=True)
class Route:
    """An exact rational route between two rates."""

    fs_in: int
    fs_out: int
    up: int
    down: int

    @property
    def lower_rate(self):
        return min(self.fs_in, self.fs_out)

    @property
    def lower_nyquist_hz(self):
        return min(self.fs_in, self.fs_out) / 2.0

    @property
    def prototype_rate(self):
        """Rate at which the single-stage prototype filter runs: fs_in * up."""
        return self.fs_in * self.up


def validate_rate(rate_hz, *, field="rate"):
    """Return ``rate_hz`` as an int after checking it is a whole number of Hz in range.

    Raises
    ------
    ParameterError
        If the rate is not a whole number, or lies outside 1000 to 768000 Hz.
    """
    rule = f"an integer from {MIN_RATE_HZ} to {MAX_RATE_HZ} Hz"
    return whole_number(rate_hz, field, low=MIN_RATE_HZ, high=MAX_RATE_HZ, text=True, rule=rule)


def route(fs_in, fs_out):
    """Return the exact :class:`Route` from ``fs_in`` to ``fs_out``.

    Examples
    --------
    >>> route(44100, 48000)
    Route(fs_in=44100, fs_out=48000, up=160, down=147)
    """
    fs_in = validate_rate(fs_in, field="fs_in")
    fs_out = validate_rate(fs_out, field="fs_out")
    g = gcd(fs_in, fs_out)
    return Route(fs_in, fs_out, fs_out // g, fs_in // g)


# ---------------------------------------------------------------- speed changes
#
# A speed factor p/q plays the source p/q times as fast: pitch and every frequency are
# multiplied by p/q, the duration by q/p. Trade practice (common practice): pull-down 1000/1001
# (film at 24 fps to video at 23.976), pull-up 1001/1000, PAL speed-up 25/24 and its
# reverse 24/25. The source is taken as if sampled at fs_in * p/q and converted to fs_out:
#     up/down = fs_out * q / (fs_in * p)   (reduced),
# so a whole signal of ``frames`` frames gives ceil(frames * up / down) frames (at the same rate,
# ceil(frames * q / p)).

MAX_SPEED_TERM = 100_000
MIN_SPEED = 0.25
MAX_SPEED = 4.0


@dataclass(frozen=True)
class SpeedChange:
    """An exact rational speed change from ``fs_in`` to ``fs_out``.

    ``speed_num/speed_den`` is the factor p/q by which frequencies (and the pace) are multiplied.
    """

    fs_in: int
    fs_out: int
    speed_num: int
    speed_den: int

    @property
    def speed(self):
        return Fraction(self.speed_num, self.speed_den)

    @property
    def ratio(self):
        """Output frames per input frame, exact."""
        return Fraction(self.fs_out * self.speed_den, self.fs_in * self.speed_num)

    @property
    def up(self):
        return self.ratio.numerator

    @property
    def down(self):
        return self.ratio.denominator

    @property
    def played_rate_hz(self):
        """The rate the source is taken at (fs_in * p/q), an exact fraction."""
        return Fraction(self.fs_in) * self.speed

    def output_length(self, frames):
        """ceil(frames * up / down)."""
        return -(-int(frames) * self.up // self.down)

    def design_rates(self):
        """Two whole-Hz rates with the same exact ratio up/down, for designing the filter.

        The source taken at fs_in * p/q is rarely a whole number of Hz; the filter only depends
        on the ratio and on edges relative to the rates, so it is designed for the pair
        (down * j, up * j) nearest to (fs_in * p/q, fs_out), and :attr:`design_scale` maps
        absolute frequencies from the output's Hz to the design's.
        """
        j = max(1, round(self.fs_out / self.up))
        a, b = self.down * j, self.up * j
        for rate, name in ((a, "fs_in"), (b, "fs_out")):
            if not MIN_RATE_HZ <= rate <= MAX_RATE_HZ:
                raise ParameterError(
                    f"speed {self.speed_num}/{self.speed_den} from {self.fs_in} to {self.fs_out} Hz "
                    f"needs the exact factor {self.up}/{self.down}, whose design rate {rate} Hz "
                    f"lies outside {MIN_RATE_HZ} to {MAX_RATE_HZ} Hz; choose a simpler factor",
                    "speed")
        return a, b

    @property
    def design_scale(self):
        return Fraction(self.design_rates()[1], self.fs_out)

    def to_dict(self):
        return dict(fs_in=self.fs_in, fs_out=self.fs_out, speed_num=self.speed_num,
                    speed_den=self.speed_den, up=self.up, down=self.down)


_SPEED_TEXT = re.compile(r"^\s*(\d+)\s*(?:/\s*(\d+))?\s*$")


def parse_speed(value):
    """A speed factor as an exact Fraction from "P/Q", "P", an int, a Fraction or (P, Q).

    Floats are refused: 0.999 is not 1000/1001, so the factor must be written exactly.
    """
    rule = (f"speed must be a factor P/Q of whole numbers up to {MAX_SPEED_TERM} from "
            f"{MIN_SPEED:g} to {MAX_SPEED:g} (for example 1000/1001)")
    if isinstance(value, str):
        m = _SPEED_TEXT.match(value)
        if not m:
            raise ParameterError(f"{rule}, got {value!r}", "speed")
        p, q = int(m.group(1)), int(m.group(2) or 1)
    elif isinstance(value, tuple) and len(value) == 2 \
            and all(isinstance(v, int) and not isinstance(v, bool) for v in value):
        p, q = value
    elif isinstance(value, Fraction) or (isinstance(value, int) and not isinstance(value, bool)):
        p, q = Fraction(value).numerator, Fraction(value).denominator
    else:
        raise ParameterError(f"{rule}, got {value!r}", "speed")
    if q == 0 or p <= 0 or max(p, q) > MAX_SPEED_TERM or not MIN_SPEED <= p / q <= MAX_SPEED:
        raise ParameterError(f"{rule}, got {p}/{q}", "speed")
    return Fraction(p, q)


def speed_change(fs_in, fs_out, speed):
    """The :class:`SpeedChange` playing ``fs_in`` audio ``speed`` times as fast, out at ``fs_out``.

    Examples
    --------
    >>> c = speed_change(48000, 48000, "1000/1001")
    >>> (c.up, c.down, c.output_length(1000))
    (1001, 1000, 1001)
    """
    fs_in = validate_rate(fs_in, field="fs_in")
    fs_out = validate_rate(fs_out, field="fs_out")
    f = parse_speed(speed)
    change = SpeedChange(fs_in, fs_out, f.numerator, f.denominator)
    change.design_rates()   # refuse factors the exact path can't take, now
    return change


def true_rate_change(fs_header, fs_true, fs_out):
    """Take a file whose header states ``fs_header`` at its true rate ``fs_true``, out at fs_out.

    ``fs_true`` may be a whole number of Hz or an exact fraction such as "48000*1000/1001"
    written as Fraction(48000000, 1001) or the text "48000000/1001". It is a speed change by
    fs_true / fs_header: the file's frequencies come out as they were recorded.
    """
    fs_header = validate_rate(fs_header, field="fs_header")
    true = parse_rate(fs_true, field="fs_true")
    return speed_change(fs_header, fs_out, true / fs_header)


def parse_rate(value, *, field="rate"):
    """A rate in Hz as an exact Fraction, from an int, a Fraction or "N" / "N/D" text."""
    rule = f"{field} must be a rate from {MIN_RATE_HZ} to {MAX_RATE_HZ} Hz as N or N/D"
    if isinstance(value, str):
        m = _SPEED_TEXT.match(value)
        if not m or int(m.group(2) or 1) == 0:
            raise ParameterError(f"{rule}, got {value!r}", field)
        rate = Fraction(int(m.group(1)), int(m.group(2) or 1))
    elif isinstance(value, Fraction) or (isinstance(value, int) and not isinstance(value, bool)):
        rate = Fraction(value)
    else:
        raise ParameterError(f"{rule}, got {value!r}", field)
    if not MIN_RATE_HZ <= rate <= MAX_RATE_HZ:
        raise ParameterError(f"{rule}, got {value!r}", field)
    return rate
