"""The one rule for numbers that come from outside: a request body, a form, the command line.

Every number is checked here before anything else uses it, so no entry point can hand the core
an infinity, a NaN, or an integer too large for a float (a 400-digit integer would raise
OverflowError the first time it met ``float()`` or ``math.isfinite``).

- :func:`finite_number` returns a finite float within [low, high];
- :func:`whole_number` returns an int within [low, high] (a float such as 48000.0 is accepted
  when it is a whole number; 44100.5 is not);
- with ``text=True`` both also read text ("48000", "-1.5"), as the command line and some JSON
  clients send it; text such as "inf" or "nan" is refused like the numbers themselves.

Failures raise :class:`ParameterError` naming the field, the rule and the value; a huge value is
shown by its size ("a 400-digit integer"), never in full.
"""

import math
import numbers
import re

from .errors import ParameterError

__all__ = ["finite_number", "whole_number", "range_text", "shown"]

_SHOWN_DIGITS = 24
_TEXT_MAX = 64
_INT_TEXT = re.compile(r"[+-]?\d+")


def shown(value):
    """``value`` as a message shows it: short, a huge integer by its number of digits."""
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        digits = len(str(abs(int(value)))) if abs(int(value)) < 10 ** 4000 else None
        if digits is None or digits > _SHOWN_DIGITS:
            sign = "-" if value < 0 else ""
            return f"a {sign}{digits or 'over 4000'}-digit integer"
        return str(int(value))
    if isinstance(value, str) and len(value) > _TEXT_MAX:
        return repr(value[:_TEXT_MAX]) + f"... ({len(value)} characters)"
    if isinstance(value, float):
        return f"{value:g}"
    return repr(value)


def range_text(low=None, high=None, unit=""):
    """"from 1 to 10 Hz", "at least 0 s", "at most 3 dB" or "" without bounds."""
    u = f" {unit}" if unit else ""
    if low is not None and high is not None:
        return f"from {low:g} to {high:g}{u}"
    if low is not None:
        return f"at least {low:g}{u}"
    if high is not None:
        return f"at most {high:g}{u}"
    return ""


def _rule(kind, low, high, unit):
    where = range_text(low, high, unit)
    return f"{kind} {where}" if where else (f"{kind} of {unit}" if unit else kind)


def _from_text(value, field, rule):
    text = value.strip()
    if len(text) > _TEXT_MAX * 8:   # a number written in text is short; refuse before parsing
        raise ParameterError(f"{field} must be {rule}, got {shown(value)}", field)
    if _INT_TEXT.fullmatch(text):
        return int(text)
    try:
        return float(text)
    except ValueError:
        raise ParameterError(f"{field} must be {rule}, got {shown(value)}", field) from None


def _checked(value, field, rule, text):
    if isinstance(value, str) and text:
        value = _from_text(value, field, rule)
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ParameterError(f"{field} must be {rule}, got {shown(value)}", field)
    if isinstance(value, numbers.Integral):
        return int(value)
    value = float(value)
    if not math.isfinite(value):
        raise ParameterError(f"{field} must be {rule} (a finite number), got {shown(value)}",
                             field)
    return value


def _in_range(value, low, high):
    # int and float compare exactly in Python, whatever the size, so a huge int never
    # reaches float() here
    return (low is None or value >= low) and (high is None or value <= high)


def finite_number(value, field, *, low=None, high=None, unit="", text=False):
    """``value`` as a finite float within [low, high].

    Parameters
    ----------
    value : int, float or str
        The number (text only with ``text=True``).
    field : str
        The name the message gives (a JSON key, an option).
    low, high : float, optional
        Inclusive bounds.
    unit : str, optional
        Shown in the message ("Hz", "dB").
    text : bool, optional
        Accept a number written as text. Default is False.

    Raises
    ------
    ParameterError
        For a bool, a non-number, an infinity, a NaN, an integer too large for a float, or a
        value out of range.
    """
    rule = _rule("a number", low, high, unit)
    value = _checked(value, field, rule, text)
    if not _in_range(value, low, high):
        raise ParameterError(f"{field} must be {rule}, got {shown(value)}", field)
    try:
        result = float(value)
    except OverflowError:
        raise ParameterError(f"{field} must be {rule} (a finite number), got "
                             f"{shown(value)}", field) from None
    return result


def whole_number(value, field, *, low=None, high=None, unit="", text=False, rule=None):
    """``value`` as an int within [low, high]; a float must be whole (48000.0, not 44100.5).

    ``rule`` replaces the generated rule text ("a whole number from 1 to 10") in messages.

    Raises
    ------
    ParameterError
        As :func:`finite_number`, and for a fractional value.
    """
    rule = rule or _rule("a whole number", low, high, unit)
    value = _checked(value, field, rule, text)
    if isinstance(value, float):
        if not value.is_integer():
            raise ParameterError(f"{field} must be {rule}, got {shown(value)}", field)
        value = int(value)
    if not _in_range(value, low, high):
        raise ParameterError(f"{field} must be {rule}, got {shown(value)}", field)
    return value
