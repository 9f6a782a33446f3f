"""Batch endpoints (see API.md, "Batches"): many recordings converted with one design and
delivery, each file an ordinary conversion on the server's pool (why: :mod:`webapp.batch.web`)."""

import os

from flask import Blueprint, Response

from webapp.batch import web
from webapp.batch.inputs import check_names
from webapp.batch.zipstream import zip_chunks
from webapp.delivery import Delivery
from webapp.dsp.errors import ParameterError, RateferryError
from webapp.store import FINAL_STATUSES, new_id

from .api import OUTPUT_FORMAT_EXTENSIONS, _json, _stem, _url
from .conversions_api import _prepare_conversion, _public_conversion, _queue_conversion, _readable
from .db import get_db, state
from .errors import ApiError
from .params import choice, json_body, recording_file_or_410, recording_or_404, spec_input

__all__ = ["bp", "MAX_BATCH_FILES"]

bp = Blueprint("batches", __name__, url_prefix="/api")
MAX_BATCH_FILES = 500


def _public_batch(b, *, members=True):
    bid = b["id"]
    out = {k: b[k] for k in ("id", "status", "counts", "progress", "fs_out", "format", "spec",
                             "delivery", "created")}
    out["urls"] = dict(self=_url("batch", id=bid), cancel=_url("batch_cancel", id=bid))
    if b["counts"].get("done") and b["status"] != "running":
        out["urls"]["zip"] = _url("batch_zip", id=bid)
    if members:
        out["conversions"] = [_public_conversion(c, figures=False) for c in b["members"]]
    return out


def _batch_or_404(batch_id):
    b = web.get_batch(get_db(), str(batch_id)) if isinstance(batch_id, str) else None
    if b is None:
        raise ApiError(404, f"batch {batch_id!r} doesn't exist", "batch_id")
    return b


def _recording_ids(data):
    ids = data.get("recording_ids")
    if not isinstance(ids, list) or not ids or not all(isinstance(i, str) for i in ids):
        raise ParameterError("recording_ids must be a list of recording ids (at least one)",
                             "recording_ids")
    if len(ids) > MAX_BATCH_FILES:
        raise ParameterError(f"a batch takes at most {MAX_BATCH_FILES} recordings, got "
                             f"{len(ids)}", "recording_ids")
    if len(set(ids)) != len(ids):
        raise ParameterError("recording_ids lists a recording twice", "recording_ids")
    return ids


@bp.post("/batches")
def create_batch():
    data = json_body()
    if data.get("design_id") is not None:
        raise ParameterError("a batch takes preset and spec (each route gets its own design), "
                             "not design_id", "design_id")
    ids = _recording_ids(data)
    fmt = choice(data, "format", tuple(OUTPUT_FORMAT_EXTENSIONS), default="flac")
    delivery = Delivery.from_dict(data.get("delivery"))
    prepared = []
    # everything is checked before anything is queued: one bad file refuses the batch
    for rid in ids:
        rec = _readable(recording_file_or_410(recording_or_404(rid)))
        spec, fs_in, fs_out, _ = spec_input(data, fs_in=rec["rate_hz"])
        try:
            cid, job, design_id = _prepare_conversion(rec, spec, fs_in, fs_out, fmt, delivery)
        except RateferryError as exc:
            raise type(exc)(f"'{rec['name']}': {exc.message}", exc.field) from None
        prepared.append((rec, cid, job, design_id))
    check_names((job.download_name(_stem(rec["name"])), rec["name"])
                for rec, _, job, _ in prepared)
    convs = [_queue_conversion(rec, cid, job, design_id, fmt, spec=job.spec, delivery=delivery)
             for rec, cid, job, design_id in prepared]
    b = web.add_batch(get_db(), batch_id=new_id(), conversion_ids=[c["id"] for c in convs],
                      fs_out=prepared[0][2].fs_out, format=fmt, spec=prepared[0][2].spec.to_dict(),
                      delivery=delivery.to_dict())
    return _json(_public_batch(b), 202)


@bp.get("/batches")
def list_batches():
    return _json(dict(batches=[_public_batch(b, members=False)
                               for b in web.list_batches(get_db())]))


@bp.get("/batches/<batch_id>")
def get_batch(batch_id):
    return _json(_public_batch(_batch_or_404(batch_id)))


@bp.post("/batches/<batch_id>/cancel")
def cancel_batch(batch_id):
    b = _batch_or_404(batch_id)
    pool = state().pool
    for c in b["members"]:
        if c["status"] not in FINAL_STATUSES:
            pool.cancel(c["id"])
    return _json(_public_batch(_batch_or_404(batch_id)))


@bp.get("/batches/<batch_id>/zip")
def batch_zip(batch_id):
    b = _batch_or_404(batch_id)
    if b["status"] == "running":
        raise ApiError(409, "the batch is still running", "batch_id")
    entries = [(c["download_name"], c["output_path"]) for c in b["members"]
               if c["status"] == "done" and os.path.isfile(c["output_path"])]
    if not entries:
        raise ApiError(409, "the batch has no converted files to download", "batch_id")
    response = Response(zip_chunks(entries), mimetype="application/zip",
                        headers={"Cache-Control": "no-store"})
    response.headers.set("Content-Disposition", "attachment",
                         filename=f"rateferry_batch_{b['fs_out']}.zip")
    return response
