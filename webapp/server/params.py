"""Request parsing: JSON bodies, numbers, rates, the spec input, ids. Thin and strict.

Every helper raises :class:`ParameterError` (400) or :class:`ApiError` naming the field and the
value, so a view never sees a half-parsed request.
"""

from contextlib import contextmanager
import os

from flask import request

from webapp.dsp.errors import ParameterError, RateferryError
from webapp.dsp.numbers import finite_number, shown, whole_number
from webapp.jsontools import loads_checked
from webapp.dsp.rates import validate_rate
from webapp.dsp.spec import DEFAULT_PRESET, Spec, preset, spec_from_dict

from .db import get_db
from .errors import ApiError

__all__ = ["json_body", "number", "integer", "choice", "rate", "spec_input", "recording_or_404",
           "recording_file_or_410", "while_on_disk",
           "conversion_or_404", "design_or_404"]


def json_body():
    """The request's JSON object (an empty body reads as {}), parsed with a depth limit."""
    raw = request.get_data(cache=True)
    if not raw:
        return {}
    data = loads_checked(raw, name="the request body")
    if not isinstance(data, dict):
        raise ParameterError("the request body must be a JSON object", "body")
    return data


def number(data, name, *, default=None, low=None, high=None, unit="", required=False):
    """A finite float from ``data[name]`` within [low, high] (the rule of
    :func:`webapp.dsp.numbers.finite_number`)."""
    value = data.get(name, default)
    if value is None:
        if required:
            raise ParameterError(f"{name} is required", name)
        return None
    return finite_number(value, name, low=low, high=high, unit=unit)


def integer(data, name, *, default=None, low=None, high=None, required=False):
    """A whole number from ``data[name]`` within [low, high]."""
    value = data.get(name, default)
    if value is None:
        if required:
            raise ParameterError(f"{name} is required", name)
        return None
    if isinstance(value, float):
        raise ParameterError(f"{name} must be a whole number, got {shown(value)}", name)
    return whole_number(value, name, low=low, high=high)


def choice(data, name, choices, *, default=None):
    value = data.get(name, default)
    if value not in choices:
        raise ParameterError(f"{name} must be one of {', '.join(map(str, choices))}, got "
                             f"{value!r}", name)
    return value


def rate(data, name, *, required=True):
    value = data.get(name)
    if value is None:
        if required:
            raise ParameterError(f"{name} is required (a rate in Hz)", name)
        return None
    return validate_rate(value, field=name)


def _ident(value, kind):
    if value is None:
        raise ParameterError(f"{kind}_id is required", f"{kind}_id")
    if not isinstance(value, str) or not value or len(value) > 64:
        raise ApiError(404, f"{kind} {value!r} doesn't exist", f"{kind}_id")
    return value


def _row_or_404(kind, value, getter):
    row = getter(_ident(value, kind))
    if row is None:
        raise ApiError(404, f"{kind} {value!r} doesn't exist", f"{kind}_id")
    return row


def recording_or_404(recording_id):
    return _row_or_404("recording", recording_id, get_db().get_recording)


def recording_file_or_410(rec):
    """``rec`` when its stored file is still on disk; else 410 naming the recording."""
    if not os.path.isfile(rec["path"]):
        raise ApiError(410, f"the audio of recording '{rec['name']}' is no longer on disk (it was "
                            "removed outside the app); upload it again", "recording_id")
    return rec


@contextmanager
def while_on_disk(rec):
    """Around work on a recording's file: when the file goes away meanwhile (a recording
    deleted by another request), answer 410 naming the recording, not the stored file."""
    try:
        yield rec
    except RateferryError:
        if not os.path.isfile(rec["path"]):
            raise ApiError(410, f"the recording '{rec['name']}' was deleted while this request "
                                "was working on it", "recording_id") from None
        raise


def conversion_or_404(conversion_id):
    return _row_or_404("conversion", conversion_id, get_db().get_conversion)


def design_or_404(design_id):
    return _row_or_404("design", design_id, get_db().get_design)


def spec_input(data, *, fs_in=None):
    """(spec, fs_in, fs_out, design_id or None) from a request body.

    Either ``design_id`` (an earlier design), or ``preset`` (default music_delivery) plus
    ``spec`` overrides with ``fs_in`` (or the given ``fs_in``, from a recording) and ``fs_out``.
    """
    if data.get("design_id") is not None:
        row = design_or_404(data["design_id"])
        spec = Spec(**row["spec"])
        if fs_in is not None and fs_in != row["fs_in"]:
            raise ParameterError(f"design {row['id']} converts from {row['fs_in']} Hz, but the "
                                 f"recording is at {fs_in} Hz", "design_id")
        return spec, row["fs_in"], row["fs_out"], row["id"]
    name = data.get("preset") or DEFAULT_PRESET
    if not isinstance(name, str):
        raise ParameterError(f"preset must be a preset name, got {name!r}", "preset")
    overrides = data.get("spec") or {}
    if not isinstance(overrides, dict):
        raise ParameterError("spec must be a JSON object of Spec fields", "spec")
    spec = spec_from_dict(overrides, base=preset(name))
    if fs_in is None:
        fs_in = rate(data, "fs_in")
    fs_out = rate(data, "fs_out")
    return spec, fs_in, fs_out, None
