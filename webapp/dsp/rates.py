"""Exact conversion factors between two integer sample rates.

Conventions: rates are integers in Hz; a route converts ``fs_in`` to ``fs_out`` by the reduced
rational factor ``up/down`` (L/M), with ``fs_out = fs_in * up / down`` exactly.
"""

from dataclasses import dataclass
from math import gcd

from .numbers import whole_number

__all__ = ["MIN_RATE_HZ", "MAX_RATE_HZ", "Route", "validate_rate", "route"]

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
