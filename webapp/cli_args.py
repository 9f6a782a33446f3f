"""Option types and the parser of the `rateferry` command: one line per error, exit code 2.

Every number on the command line goes through the rule of :mod:`webapp.dsp.numbers` (the same
one the server uses), as an argparse ``type=``: ``--to 44100.5``, ``--to nan`` or a 400-digit
``--to`` end with ``rateferry: error: --to must be an integer from 1000 to 768000 Hz, got ...``
and exit code 2, never a traceback or the usage block.
"""

import argparse
import re

from .dsp.errors import ParameterError
from .dsp.numbers import finite_number, whole_number
from .dsp.rates import validate_rate

__all__ = ["OneLineParser", "rate_arg", "number_arg", "whole_arg", "EXIT_BAD_INPUT"]

EXIT_BAD_INPUT = 2
_REPEATED_OPTION = re.compile(r"^argument (\S+?)(?:/\S+)?: \1 ")


class OneLineParser(argparse.ArgumentParser):
    """An ArgumentParser whose errors are one line on stderr (``--help`` still shows usage)."""

    def error(self, message):
        # "argument --to: --to must be ..." -> "--to must be ..." (our messages name the option)
        message = _REPEATED_OPTION.sub(r"\1 ", message, count=1)
        self.exit(EXIT_BAD_INPUT, f"rateferry: error: {' '.join(message.split())}\n")


def _typed(check, name):
    def parse(text):
        try:
            return check(text)
        except ParameterError as exc:
            # argparse prefixes "argument --to: "; the message names the option already
            raise argparse.ArgumentTypeError(exc.message) from None
    parse.__name__ = name   # argparse shows it for errors without a message
    return parse


def rate_arg(option):
    """A sample rate in Hz (whole number from 1000 to 768000)."""
    return _typed(lambda text: validate_rate(text, field=option), "rate")


def number_arg(option, *, low=None, high=None, unit=""):
    """A finite number within [low, high]."""
    return _typed(lambda text: finite_number(text, option, low=low, high=high, unit=unit,
                                             text=True), "number")


def whole_arg(option, *, low=None, high=None):
    """A whole number within [low, high]."""
    return _typed(lambda text: whole_number(text, option, low=low, high=high, text=True),
                  "whole number")
