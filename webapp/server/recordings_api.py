"""The recordings endpoints (see openapi.json): upload, list, audio, overview, delete."""

import os

from flask import Blueprint, current_app, request, send_file

from webapp import media
from webapp.jsontools import jsonable
from webapp.dsp.errors import AudioFileError, RateferryError
from webapp.dsp.numbers import whole_number
from webapp.store import ACTIVE_STATUSES

from .api import _MIMETYPES, _file_field, _json, _url
from . import spectra_ahead
from .db import get_db, state
from .errors import ApiError
from .library import analyse, probe_figures
from .params import (recording_file_or_410, recording_or_404)
from .uploads import discard_incoming, display_name, take_upload, \
    upload_extension

__all__ = ["bp"]

bp = Blueprint("recordings", __name__, url_prefix="/api")


# ---------------------------------------------------------------------------------------------
# recordings

def _public_recording(rec):
    keys = ("id", "name", "demo", "rate_hz", "channels", "frames", "duration_s", "format",
            "subtype", "size_bytes", "tags", "integrated_lufs", "loudness_range_lu",
            "true_peak_dbtp", "sample_peak_dbfs", "analysis", "analysis_note", "analysis_error",
            "created")
    out = {k: rec.get(k) for k in keys}
    out["audio_url"] = _url("recording_audio", id=rec["id"])
    return out


def _with_name(exc, generated, name, field="file"):
    """The core's error about a stored file, told with the user's file name."""
    message = exc.message.replace(os.path.basename(generated), name)
    return type(exc)(message, field if exc.field in (None, "path") else exc.field)




def _columns(raw):
    """The overview's ``columns`` (query parameter or form field): a whole number, 1 to 4000."""
    from webapp.overview import MAX_COLUMNS
    return whole_number(raw, "columns", low=1, high=MAX_COLUMNS, text=True)


@bp.post("/recordings")
def upload_recording():
    try:
        storage = _file_field()
        raw = request.form.get("columns")
        # the page's overview width: the overview is drawn by the same read as the meters
        columns = None if raw is None else _columns(raw)
        # the page's route: its spectra run beside the analysis
        wanted = spectra_ahead.form_field(request.form.get("spectra"))
        name = display_name(storage.filename)
        ext = upload_extension(storage.filename)
        st = state()
        target = st.store.upload_path(ext)
        size = take_upload(request, storage, target)
    finally:
        discard_incoming(request)
    if size == 0:
        os.unlink(target)
        raise AudioFileError(f"cannot read '{name}': the file is empty (0 bytes)", "file")
    overview = ahead = None
    try:
        info = media.probe(target)
        if wanted is not None:
            ahead = spectra_ahead.start(st.ahead, st.cache, wanted, target, info)
        if info.duration_s <= current_app.config["ANALYSE_SYNC_MAX_S"]:
            meters, overview = analyse(target, info, columns)
        else:
            meters = dict(analysis="pending")
    except RateferryError as exc:
        if ahead is not None:
            ahead[1].cancel()
        os.unlink(target)
        raise _with_name(exc, target, name) from None
    rec = get_db().add_recording(name=name, path=target, owned=True, demo=False,
                                 probe=probe_figures(info), meters=meters)
    if overview is not None:
        st.cache.put("overview", (rec["id"], columns), overview)
    if ahead is not None:
        ask, future = ahead
        st.cache.adopt(spectra_ahead.KIND, spectra_ahead.cache_key(rec["id"], ask), future)
    if meters["analysis"] == "pending":
        st.analyses.submit(st.background, rec["id"], columns, _analyse_later, st, rec["id"],
                           target, info, name, columns)
    return _json(_public_recording(rec), 201)


def _analyse_later(st, recording_id, path, info, name, columns):
    """The background analysis of a long upload; returns its overview (or None)."""
    try:
        meters, overview = analyse(path, info, columns)
    except RateferryError as exc:
        err = _with_name(exc, path, name)
        meters = dict(analysis="failed", analysis_error=dict(message=err.message,
                                                             field=err.field))
        overview = None
    with st.store.open() as db:
        db.update_meters(recording_id, meters)
    if overview is not None:
        st.cache.put("overview", (recording_id, columns), overview)
    return overview


@bp.get("/recordings")
def list_recordings():
    return _json(dict(recordings=[_public_recording(r) for r in get_db().list_recordings()]))


@bp.get("/recordings/<recording_id>")
def get_recording(recording_id):
    return _json(_public_recording(recording_or_404(recording_id)))


@bp.get("/recordings/<recording_id>/audio")
def recording_audio(recording_id):
    rec = recording_file_or_410(recording_or_404(recording_id))
    return send_file(rec["path"], mimetype=_MIMETYPES.get(rec["format"],
                                                          "application/octet-stream"),
                     conditional=True, download_name=rec["name"])


@bp.get("/recordings/<recording_id>/overview")
def recording_overview(recording_id):
    from webapp.overview import DEFAULT_COLUMNS, overview
    rec = recording_or_404(recording_id)
    columns = _columns(request.args.get("columns", str(DEFAULT_COLUMNS)))
    st = state()

    def compute():
        # a long upload's background analysis may be drawing these very columns: wait for it
        body = st.analyses.overview(rec["id"], columns)
        return body if body is not None else jsonable(overview(rec["path"], columns=columns))
    body, cached = st.cache.memo("overview", (rec["id"], columns), compute)
    return _json(dict(body, recording_id=rec["id"], cached=cached), clean=True)


@bp.delete("/recordings/<recording_id>")
def delete_recording(recording_id):
    rec = recording_or_404(recording_id)
    if rec["demo"]:
        raise ApiError(409, "the demo recording can't be deleted", "recording_id")
    db = get_db()
    if any(c["status"] in ACTIVE_STATUSES for c in db.list_conversions(recording_id=rec["id"])):
        raise ApiError(409, "the recording has a conversion in progress; cancel it first",
                       "recording_id")
    db.delete_recording(rec["id"])
    return _json(dict(deleted=rec["id"]))
