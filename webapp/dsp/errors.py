"""The one error hierarchy of Rateferry.

Messages state the rule and the offending value, e.g.
``"rate must be an integer from 1000 to 768000 Hz, got 0"``.
"""

__all__ = ["RateferryError", "ParameterError", "AudioFileError"]


class RateferryError(Exception):
    """Base class of every error Rateferry raises on purpose.

    Parameters
    ----------
    message : str
        The rule that was broken and the value that broke it.
    field : str, optional
        The name of the parameter (a spec field, a CLI option, a form field) that caused it.
    """

    def __init__(self, message, field=None):
        super().__init__(message)
        self.message = message
        self.field = field


class ParameterError(RateferryError, ValueError):
    """A parameter value breaks a rule (out of range, unknown name, unmeetable mask)."""


class AudioFileError(RateferryError):
    """A media file can't be read, written or carries unusable audio."""
