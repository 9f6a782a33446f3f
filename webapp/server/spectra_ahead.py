"""The spectra of a recording as ``POST /api/spectra`` asks for them, and the same spectra
started ahead, beside an upload's analysis.

An upload may carry the page's route in its ``spectra`` form field (the body the page would post
to ``/api/spectra``, without ``recording_id``). The spectra then run on a thread of their own
while the upload reads the file for its meters and overview, and are kept in the design cache
under the new recording's id: the page's ``POST /api/spectra`` a moment later finds them done
(or waits for them) instead of starting them only then. A route the spectra would refuse is left
for that request to report, as before; nothing is started for an extreme design (the page asks
the user first) nor for a route to the recording's own rate (the page moves such a route).
"""

from collections import namedtuple

from flask import current_app

from webapp import figures
from webapp.designs import design_estimate
from webapp.dsp.errors import ParameterError, RateferryError
from webapp.jsontools import loads_checked

from .api import _bool
from .errors import ApiError
from .params import number, spec_input

__all__ = ["Ask", "read_ask", "cache_key", "compute", "form_field", "start", "KIND"]

#: The design cache's kind for spectra.
KIND = "spectra"

Ask = namedtuple("Ask", "spec fs_in fs_out design_id start_s length_s log_axis")


def read_ask(data, fs_in):
    """The spectra a ``POST /api/spectra`` body asks for, for a recording at ``fs_in`` Hz."""
    spec, fs_in, fs_out, design_id = spec_input(data, fs_in=fs_in)
    max_s = current_app.config["EXCERPT_MAX_S"]
    start_s = number(data, "start_s", low=0.0, unit="s")
    length_s = number(data, "length_s", low=0.0, high=max_s, unit="s")
    log_axis = _bool(data, "log_axis", False)
    return Ask(spec, fs_in, fs_out, design_id, start_s, length_s, log_axis)


def cache_key(recording_id, ask):
    """The design cache's key of the spectra ``ask`` of a recording."""
    return (recording_id, ask.spec, ask.fs_in, ask.fs_out, ask.start_s, ask.length_s,
            ask.log_axis)


def compute(plan, path, info, ask, max_s):
    """The spectra view (:func:`webapp.figures.spectra_view`) of ``ask`` with ``plan``."""
    return figures.spectra_view(path, info, plan, start_s=ask.start_s, length_s=ask.length_s,
                                log_axis=ask.log_axis, max_length_s=max_s)


def form_field(raw):
    """An upload's ``spectra`` form field: the JSON object it holds, or None without one.

    Raises
    ------
    ParameterError
        (field ``spectra``) when it is not a JSON object.
    """
    if raw is None:
        return None
    try:
        data = loads_checked(raw, name="the spectra field")
    except ParameterError as exc:
        raise ParameterError(exc.message, "spectra") from None
    if not isinstance(data, dict):
        raise ParameterError("the spectra field must be a JSON object (the body of POST "
                             f"/api/spectra without recording_id), got {type(data).__name__}",
                             "spectra")
    return data


def start(executor, cache, data, path, info):
    """Start the spectra ``data`` asks for on ``executor``; returns ``(ask, future)``, or None
    when there is nothing to start ahead (see the module's text)."""
    try:
        ask = read_ask(data, info.rate_hz)
        if ask.fs_out == ask.fs_in or design_estimate(ask.spec, ask.fs_in, ask.fs_out)["extreme"]:
            return None
    except (RateferryError, ApiError):
        return None
    max_s = current_app.config["EXCERPT_MAX_S"]

    def run():
        plan = cache.route_plan(ask.spec, ask.fs_in, ask.fs_out)
        return compute(plan, path, info, ask, max_s)
    return ask, executor.submit(run)
