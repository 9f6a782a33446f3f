"""The time base endpoints (see API.md, "Time base"): measure the drift between two recordings,
listen to them summed before and after the correction, and run the corrected conversion (an
ordinary conversion with a time base: progress, downloads and history like any other).

Views parse, call :mod:`webapp.drift_files` / :mod:`webapp.jobs`, and serialise.
"""

import os

from flask import Blueprint, current_app, send_file

from webapp import drift_files, media
from webapp.delivery import Delivery
from webapp.dsp.errors import ParameterError
from webapp.dsp.timebase import timebase_design
from webapp.jsontools import jsonable
from webapp.store import new_id

from .api import OUTPUT_FORMAT_EXTENSIONS, _json, _stem, _store_design, _url
from .conversions_api import _public_conversion, _queue_conversion, _readable
from .db import get_db, state
from .errors import ApiError
from .params import (choice, json_body, number, recording_file_or_410, recording_or_404,
                     spec_input)

__all__ = ["bp", "LISTEN_KINDS"]

bp = Blueprint("drift", __name__, url_prefix="/api/drift")

LISTEN_KINDS = ("before", "after")


def _recording(data, name):
    if data.get(name) is None:
        raise ParameterError(f"{name} is required (a recording id)", name)
    try:
        return _readable(recording_file_or_410(recording_or_404(data[name])))
    except ApiError as exc:
        raise ApiError(exc.status, exc.message, name) from None
    except ParameterError as exc:
        raise ParameterError(exc.message, name) from None


def _pair(data):
    ref, trk = _recording(data, "reference_id"), _recording(data, "track_id")
    if ref["id"] == trk["id"]:
        raise ParameterError("the reference and the track must be two different recordings",
                             "track_id")
    return ref, trk


def _measurement(ref, trk):
    """The drift of ``trk`` against ``ref``, measured once and kept in the design cache."""
    value, cached = state().cache.memo(
        "drift", (ref["id"], trk["id"]),
        lambda: drift_files.measure_files(ref["path"], trk["path"]))
    return value, cached


@bp.post("")
def measure():
    data = json_body()
    ref, trk = _pair(data)
    m, cached = _measurement(ref, trk)
    body = drift_files.drift_report(m, reference_name=ref["name"], track_name=trk["name"])
    body.update(reference_id=ref["id"], track_id=trk["id"], cached=cached)
    return _json(body)


@bp.post("/listen")
def listen():
    data = json_body()
    ref, trk = _pair(data)
    m, _ = _measurement(ref, trk)
    max_s = current_app.config["EXCERPT_MAX_S"]
    start_s = number(data, "start_s", default=0.0, low=0.0, unit="s")
    length_s = number(data, "length_s", default=10.0, low=1.0, high=max_s, unit="s")
    before, after, figures = drift_files.summed_excerpts(ref["path"], trk["path"], m,
                                                         start_s=start_s, length_s=length_s)
    st = state()
    rid = new_id()
    paths = {}
    for kind, x in zip(LISTEN_KINDS, (before, after)):
        path = os.path.join(st.store.renditions, f"{rid}_{kind}.wav")
        plan = media.output_plan(path, rate_hz=figures["rate_hz"], channels=1, bits="32f")
        with media.AtomicWriter(path, plan) as w:
            w.write(x.astype("float32")[:, None])
        paths[kind] = path
    get_db().add_rendition(rendition_id=rid, recording_id=trk["id"], conversion_id=None,
                           figures=jsonable(figures), paths=paths)
    body = dict(figures, id=rid, reference_id=ref["id"], track_id=trk["id"])
    for kind in LISTEN_KINDS:
        body[kind] = dict(url=_url("drift_listen_audio", id=rid, kind=kind))
    return _json(body, 201)


@bp.get("/listen/<rendition_id>/<kind>")
def listen_audio(rendition_id, kind):
    row = get_db().get_rendition(rendition_id)
    if row is None or kind not in LISTEN_KINDS or kind not in row["paths"]:
        raise ApiError(404, f"no summed excerpt {rendition_id!r} of kind {kind!r} (kinds: "
                            f"{', '.join(LISTEN_KINDS)})", "rendition_id")
    path = row["paths"][kind]
    if not os.path.isfile(path):
        raise ApiError(404, "the excerpt was removed (cleared as old)", "rendition_id")
    return send_file(path, mimetype="audio/wav", conditional=True)


@bp.post("/conversions")
def convert():
    data = json_body()
    ref, trk = _pair(data)
    m, _ = _measurement(ref, trk)
    tb = m.time_base()
    data = dict(data, fs_out=tb.fs_out)
    spec, fs_in, fs_out, _ = spec_input(data, fs_in=trk["rate_hz"])
    fmt = choice(data, "format", tuple(OUTPUT_FORMAT_EXTENSIONS), default="flac")
    delivery = Delivery.from_dict(data.get("delivery"))
    st = state()
    plan, _ = st.cache.memo("timebase_design", (spec, tb), lambda: timebase_design(spec, tb))
    cid = new_id()
    job = drift_files.correction_job(
        trk["path"], st.store.output_path(cid, OUTPUT_FORMAT_EXTENSIONS[fmt]), m, spec=spec,
        delivery=delivery, plan=plan)
    design_id = _store_design(spec, fs_in, fs_out, job.plan.figures())
    conv = _queue_conversion(trk, cid, job, design_id, fmt, spec=spec, delivery=delivery,
                             stem=f"{_stem(trk['name'])}_aligned")
    return _json(_public_conversion(conv), 202)
