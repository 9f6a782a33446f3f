"""The conversions endpoints (see openapi.json): start, list, follow, cancel, download, listen,
sheet and recipe of a conversion; a recipe uploaded to run again. The helpers that put a
conversion in the queue and describe one serve the batch and drift endpoints too."""

import json
import os
import secrets
import time

from flask import Blueprint, Response, current_app, request, send_file

from webapp import media
from webapp.jsontools import jsonable
from webapp.dsp import spec as spec_module
from webapp.dsp.errors import ParameterError
from webapp.dsp.timebase import TimeBase, timebase_design
from webapp.store import FINAL_STATUSES, new_id
from webapp.delivery import Delivery
from webapp import jobs
from webapp import listening
from webapp.recipe import load_recipe, recipe_file_name
from .api import (_MIMETYPES, DEFAULT_FORMAT, OUTPUT_FORMAT_EXTENSIONS, _file_field, _json, _stem,
                  _store_design, _url)
from .db import get_db, state
from .errors import ApiError
from .params import choice, conversion_or_404, json_body, recording_file_or_410, recording_or_404, spec_input
from .uploads import discard_incoming

__all__ = ["bp"]

bp = Blueprint("conversions", __name__, url_prefix="/api")


# ---------------------------------------------------------------------------------------------
# conversions

def _sheet_name(download_name):
    return os.path.splitext(download_name)[0] + "_sheet.html"


def _public_conversion(conv, *, figures=True):
    out = {k: conv[k] for k in ("id", "recording_id", "design_id", "status", "cancel_requested",
                                "fs_in", "fs_out", "format", "spec", "delivery", "progress",
                                "error", "download_name", "created", "started", "finished")}
    if figures:
        out["figures"] = conv["figures"]
    # the names the downloads get (the recipe's as the CLI and the sheet name it)
    out["recipe_name"] = recipe_file_name(conv["download_name"])
    out["sheet_name"] = _sheet_name(conv["download_name"])
    cid = conv["id"]
    out["urls"] = dict(self=_url("conversion", id=cid), events=_url("conversion_events", id=cid),
                       cancel=_url("conversion_cancel", id=cid))
    if conv["status"] == "done":
        out["urls"].update(download=_url("conversion_download", id=cid),
                           audio=_url("conversion_audio", id=cid),
                           sheet=_url("conversion_sheet", id=cid),
                           recipe=_url("conversion_recipe", id=cid),
                           blind_trials=_url("blind_trials", id=cid))
    return out


def _readable(rec):
    if rec.get("analysis") == "failed":
        err = rec.get("analysis_error") or {}
        raise ParameterError(err.get("message", "the recording can't be read"), "recording_id")
    return rec


def _prepare_conversion(rec, spec, fs_in, fs_out, fmt, delivery, design_id=None):
    """(conversion id, job, design id): checked and decided, nothing queued yet."""
    st = state()
    plan = st.cache.conversion_plan(spec, fs_in, fs_out)   # one design per route, cached
    if design_id is None:
        design_id = _store_design(spec, fs_in, fs_out, plan.figures())
    cid = new_id()
    job = jobs.prepare(rec["path"], st.store.output_path(cid, OUTPUT_FORMAT_EXTENSIONS[fmt]),
                       fs_out=fs_out, spec=spec, delivery=delivery, plan=plan)
    return cid, job, design_id


def _queue_conversion(rec, cid, job, design_id, fmt, *, spec, delivery, recipe=None,
                      stem=None):
    """Add the conversion to the store and queue it on the pool; returns its row. Every
    conversion endpoint (plain, recipe re-run, time base) queues through here; ``stem`` names
    the download (default: the recording's name)."""
    conv = get_db().add_conversion(
        conversion_id=cid, recording_id=rec["id"], design_id=design_id, fs_in=job.fs_in,
        fs_out=job.fs_out, format=fmt, spec=spec.to_dict(), delivery=delivery.to_dict(),
        output_path=job.target, download_name=job.download_name(stem or _stem(rec["name"])),
        frames_total=job.frames_total)

    def run(progress, cancel):
        if recipe is not None:
            return jobs.rerun(recipe, job.source, job.target, progress=progress, cancel=cancel,
                              job=job).result
        return jobs.run(job, progress=progress, cancel=cancel)

    state().pool.submit(cid, run)
    return conv


def _recipe_job(data, rec, target_for):
    """(job, design inputs) of a recipe re-run: the recipe's spec, rate, delivery, block size
    and output format; the recording must be the recipe's source (checked before any work)."""
    recipe = load_recipe(data["recipe"])
    ext = os.path.splitext(recipe.data["output"]["name"])[1].lower()
    if ext not in OUTPUT_FORMAT_EXTENSIONS.values():
        raise ParameterError(f"recipe output {recipe.data['output']['name']!r} is not a format "
                             "the page writes", "recipe")
    fmt = next(k for k, v in OUTPUT_FORMAT_EXTENSIONS.items() if v == ext)
    plan = None     # a time base or a speed change is designed by the job model itself
    if recipe.time_base is None and recipe.speed is None:
        plan = state().cache.conversion_plan(recipe.spec, recipe.fs_in, recipe.fs_out)
    job = jobs.prepare_rerun(recipe, rec["path"], target_for(ext), plan=plan)
    return recipe, job, fmt


@bp.post("/conversions")
def create_conversion():
    data = json_body()
    rec = _readable(recording_file_or_410(recording_or_404(data.get("recording_id"))))
    recipe = None
    if data.get("recipe") is not None:
        cid = new_id()
        recipe, job, fmt = _recipe_job(data, rec,
                                       lambda ext: state().store.output_path(cid, ext))
        spec, delivery = recipe.spec, recipe.delivery
        design_id = _store_design(spec, job.fs_in, job.fs_out, job.plan.figures())
    else:
        spec, fs_in, fs_out, design_id = spec_input(data, fs_in=rec["rate_hz"])
        fmt = choice(data, "format", tuple(OUTPUT_FORMAT_EXTENSIONS), default=DEFAULT_FORMAT)
        delivery = Delivery.from_dict(data.get("delivery"))
        cid, job, design_id = _prepare_conversion(rec, spec, fs_in, fs_out, fmt, delivery,
                                                  design_id)
    conv = _queue_conversion(rec, cid, job, design_id, fmt, spec=spec, delivery=delivery,
                             recipe=recipe)
    return _json(_public_conversion(conv), 202)


@bp.get("/conversions")
def list_conversions():
    rid = request.args.get("recording_id")
    rows = get_db().list_conversions(recording_id=rid)
    return _json(dict(conversions=[_public_conversion(c, figures=False) for c in rows]))


@bp.get("/conversions/<conversion_id>")
def get_conversion(conversion_id):
    return _json(_public_conversion(conversion_or_404(conversion_id)))


@bp.get("/conversions/<conversion_id>/events")
def conversion_events(conversion_id):
    conv = conversion_or_404(conversion_id)
    store = state().store
    interval = float(current_app.config["SSE_INTERVAL_S"])
    ends = time.monotonic() + float(current_app.config["SSE_MAX_S"])
    cid = conv["id"]
    release = state().streams.take()   # 429 + Retry-After when all stream slots are taken

    def stream():
        last, quiet_since = None, time.monotonic()
        with store.open() as db:
            yield "retry: 1000\n\n"
            while time.monotonic() < ends:
                c = db.get_conversion(cid)
                if c is None:
                    return
                if c["status"] in FINAL_STATUSES:
                    text = json.dumps(jsonable(_public_conversion(c)), allow_nan=False)
                    yield f"event: end\ndata: {text}\n\n"
                    return
                text = json.dumps(jsonable(_public_conversion(c, figures=False)),
                                  allow_nan=False)
                if text != last:
                    yield f"data: {text}\n\n"
                    last, quiet_since = text, time.monotonic()
                elif time.monotonic() - quiet_since > 10:
                    yield ": still working\n\n"
                    quiet_since = time.monotonic()
                time.sleep(interval)

    response = Response(stream(), mimetype="text/event-stream",
                        headers={"Cache-Control": "no-cache", "X-Accel-Buffering": "no"})
    response.call_on_close(release)
    return response


@bp.post("/conversions/<conversion_id>/cancel")
def cancel_conversion(conversion_id):
    conv = conversion_or_404(conversion_id)
    if conv["status"] in FINAL_STATUSES:
        raise ApiError(409, f"the conversion is already {conv['status']}", "conversion_id")
    state().pool.cancel(conv["id"])
    return _json(_public_conversion(get_db().get_conversion(conv["id"])))


def _done_or_409(conv):
    if conv["status"] != "done":
        raise ApiError(409, f"the conversion is {conv['status']}, not done", "conversion_id")
    if not os.path.isfile(conv["output_path"]):
        raise ApiError(404, "the converted file was removed (cleared as old)", "conversion_id")
    return conv


@bp.get("/conversions/<conversion_id>/download")
def download_conversion(conversion_id):
    conv = _done_or_409(conversion_or_404(conversion_id))
    return send_file(conv["output_path"], as_attachment=True,
                     download_name=conv["download_name"], conditional=True,
                     mimetype=_MIMETYPES.get((conv["figures"] or {}).get("output_format"),
                                             "application/octet-stream"))


@bp.get("/conversions/<conversion_id>/audio")
def conversion_audio(conversion_id):
    conv = _done_or_409(conversion_or_404(conversion_id))
    return send_file(conv["output_path"], conditional=True,
                     mimetype=_MIMETYPES.get((conv["figures"] or {}).get("output_format"),
                                             "application/octet-stream"))


def _result_for(conv):
    """The ConversionResult of a finished conversion: kept in memory, or rebuilt from the store
    after a restart (the design is recomputed from its spec: designs are deterministic)."""
    st = state()
    result = st.result(conv["id"])
    if result is not None:
        return result
    from webapp.pipeline import ConversionResult
    rec = recording_or_404(conv["recording_id"])
    f = conv["figures"]
    spec = spec_module.Spec(**conv["spec"])
    time_base = TimeBase.from_dict(f["time_base"]) if f.get("time_base") else None
    plan = (timebase_design(spec, time_base) if time_base is not None
            else st.cache.conversion_plan(spec, conv["fs_in"], conv["fs_out"]))
    output_meters = {k: v for k, v in f["output"].items() if k != "clipped_samples"}
    return ConversionResult(
        source_path=rec["path"], output_path=conv["output_path"], fs_in=conv["fs_in"],
        fs_out=conv["fs_out"], channels=f["channels"], frames_in=f["frames_in"],
        frames_out=f["frames_out"], seconds=f["seconds"], spec=spec,
        delivery=Delivery(**f["delivery"]), plan=plan, source_probe=media.probe(rec["path"]),
        output_format=f["output_format"], output_subtype=f["output_subtype"], bits=f["bits"],
        gain_db=f["gain_db"], gain_reason=f["gain_reason"], source_meters=f["source"],
        output_meters=output_meters, clipped_samples=f["clipped_samples"], passes=f["passes"],
        source_sha256=f["source_sha256"], output_sha256=f["output_sha256"], version=f["version"],
        time_base=time_base, channels_out=f.get("channels_out"),
        filter_applied=f.get("filter_applied", True),
        delivery_report=f.get("delivery_report") or {})


def _user_names(conv):
    """The names the user knows (upload name, download name), not the stored generated ones."""
    rec = get_db().get_recording(conv["recording_id"])
    return dict(source_name=rec["name"] if rec else None, output_name=conv["download_name"])


def _blind_summary(conversion_id):
    trials = get_db().list_blind_trials(conversion_id)
    if not trials:
        return None
    n = sum(t["trials"] for t in trials)
    k = sum(t["correct"] for t in trials)
    return dict(trials=n, correct=k, p_value=listening.binomial_tail(k, n), sessions=len(trials))


def _attachment(body, name, mimetype):
    response = current_app.response_class(body, mimetype=mimetype)
    response.headers.set("Content-Disposition", "attachment", filename=name)
    return response


@bp.get("/conversions/<conversion_id>/sheet")
def conversion_sheet(conversion_id):
    conv = _done_or_409(conversion_or_404(conversion_id))
    from webapp import sheet
    texts = {k: request.args.get(k) or None for k in ("title", "author", "note")}
    result = _result_for(conv)
    st = state()
    tmp = os.path.join(st.store.outputs, f".sheet-{secrets.token_hex(8)}.html")
    try:
        sheet.write_sheet(result, tmp, blind=_blind_summary(conv["id"]), **texts,
                          **_user_names(conv))
        with open(tmp, "rb") as f:
            body = f.read()
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return _attachment(body, _sheet_name(conv["download_name"]), "text/html")


@bp.get("/conversions/<conversion_id>/recipe")
def conversion_recipe(conversion_id):
    conv = _done_or_409(conversion_or_404(conversion_id))
    path = conv["recipe_path"]
    if not path or not os.path.isfile(path):
        from webapp.recipe import write_recipe
        path = os.path.join(state().store.outputs, f"{conv['id']}_recipe.json")
        write_recipe(_result_for(conv), path, **_user_names(conv))
    with open(path, "rb") as f:
        body = f.read()
    name = recipe_file_name(conv["download_name"])
    return _attachment(body, name, "application/json")


# ---------------------------------------------------------------------------------------------
# recipes

@bp.post("/recipes")
def upload_recipe():
    try:
        body = _file_field().stream.read(4 << 20)
    finally:
        discard_incoming(request)
    recipe = load_recipe(body)
    return _json(dict(spec=recipe.spec.to_dict(), fs_in=recipe.fs_in, fs_out=recipe.fs_out,
                      delivery=recipe.delivery.to_dict(), block_frames=recipe.block_frames,
                      source_name=recipe.source_name, source_sha256=recipe.source_sha256,
                      output_sha256=recipe.output_sha256, recipe=recipe.to_dict()))
