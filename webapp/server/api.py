"""The JSON API (see API.md). Views parse, call the core or the store, and serialise."""

import json
import os
import re
import secrets
import time

from flask import Blueprint, Response, current_app, request, send_file

from webapp import __version__, media
from webapp.jsontools import jsonable
from webapp.dsp import spec as spec_module
from webapp.dsp.errors import ParameterError
from webapp.dsp.rates import MAX_RATE_HZ, MIN_RATE_HZ
from webapp.dsp.timebase import TimeBase, timebase_design
from webapp.store import FINAL_STATUSES, new_id
from webapp.delivery import CHANNEL_LAYOUTS, DITHERS, MONO_LAWS, MP3_MODES, Delivery
from webapp.profiles import PROFILES
from webapp import jobs

from webapp import figures, listening
from webapp.designs import PLAYBACK_PRESET, design_key
from webapp.recipe import load_recipe, recipe_file_name
from .db import get_db, state
from .errors import ApiError
from .params import (choice, conversion_or_404, json_body, number, recording_file_or_410, recording_or_404, spec_input)
from .uploads import UPLOAD_EXTENSIONS, discard_incoming, display_name

__all__ = ["bp", "URLS", "COMMON_RATES_HZ", "OUTPUT_FORMAT_EXTENSIONS"]

bp = Blueprint("api", __name__, url_prefix="/api")

#: URL templates the page reads from its config element.
URLS = {
    "health": "/api/health",
    "openapi": "/api/openapi.json",
    "options": "/api/options",
    "recordings": "/api/recordings",
    "recording": "/api/recordings/{id}",
    "recording_audio": "/api/recordings/{id}/audio",
    "designs": "/api/designs",
    "design": "/api/designs/{id}",
    "design_plans": "/api/designs/{id}/plans",
    "design_estimate": "/api/estimates",
    "recording_overview": "/api/recordings/{id}/overview",
    "audits": "/api/audits",
    "spectra": "/api/spectra",
    "conversions": "/api/conversions",
    "conversion": "/api/conversions/{id}",
    "conversion_events": "/api/conversions/{id}/events",
    "conversion_cancel": "/api/conversions/{id}/cancel",
    "conversion_download": "/api/conversions/{id}/download",
    "conversion_audio": "/api/conversions/{id}/audio",
    "conversion_sheet": "/api/conversions/{id}/sheet",
    "conversion_recipe": "/api/conversions/{id}/recipe",
    "blind_trials": "/api/conversions/{id}/blind_trials",
    "recipes": "/api/recipes",
    "renditions": "/api/renditions",
    "rendition_audio": "/api/renditions/{id}/{kind}",
    "drift": "/api/drift",
    "drift_listen": "/api/drift/listen",
    "drift_listen_audio": "/api/drift/listen/{id}/{kind}",
    "drift_conversions": "/api/drift/conversions",
    "clear": "/api/maintenance/clear",
    "batches": "/api/batches",
    "batch": "/api/batches/{id}",
    "batch_cancel": "/api/batches/{id}/cancel",
    "batch_zip": "/api/batches/{id}/zip",
    "plotly": "/static/vendor/plotly.min.js",
}

COMMON_RATES_HZ = (8000, 11025, 16000, 22050, 24000, 32000, 44100, 48000, 88200, 96000,
                   176400, 192000)
#: The page's first target: the first of these that differs from the recording's rate.
DEFAULT_TARGETS_HZ = (48000, 44100)
DEFAULT_FORMAT = "flac"
#: Output format names the page offers -> file extension.
OUTPUT_FORMAT_EXTENSIONS = {"flac": ".flac", "wav": ".wav", "aiff": ".aiff", "w64": ".w64",
                            "rf64": ".rf64", "ogg": ".ogg", "opus": ".opus", "mp3": ".mp3"}
_MIMETYPES = {"WAV": "audio/wav", "RF64": "audio/wav", "W64": "audio/x-w64",
              "FLAC": "audio/flac", "OGG": "audio/ogg", "AIFF": "audio/aiff",
              "MPEG": "audio/mpeg", "CAF": "audio/x-caf", "AU": "audio/basic"}
RENDITION_KINDS = ("original", "converted", "difference")
_STEM_UNSAFE = re.compile(r"[^\w.\- ]+")


def _url(name, **parts):
    text = URLS[name]
    for key, value in parts.items():
        text = text.replace("{" + key + "}", value)
    return text


def _json(body, status=200, *, clean=False):
    """A JSON response; ``clean`` bodies are plain JSON types already (cached views)."""
    response = current_app.response_class(
        json.dumps(body if clean else jsonable(body), allow_nan=False, separators=(",", ":")),
        status=status, mimetype="application/json")
    return response


def _stem(name):
    stem = os.path.splitext(display_name(name))[0]
    stem = _STEM_UNSAFE.sub("_", stem).strip(" ._") or "recording"
    return stem[:120]


def _store_design(spec, fs_in, fs_out, figures):
    return get_db().put_design(key=design_key(spec, fs_in, fs_out), fs_in=fs_in,
                               fs_out=fs_out, spec=spec.to_dict(), figures=jsonable(figures))

def _bool(data, name, default):
    value = data.get(name, default)
    if not isinstance(value, bool):
        raise ParameterError(f"{name} must be true or false, got {value!r}", name)
    return value

def _file_field():
    """The multipart field ``file`` of the request."""
    storage = request.files.get("file")
    if storage is None:
        raise ParameterError("the upload must be a multipart form with a field 'file'", "file")
    return storage


# ---------------------------------------------------------------------------------------------
# health and options

@bp.get("/health")
def health():
    return _json(dict(status="ok", version=__version__))


@bp.get("/openapi.json")
def openapi():
    """The OpenAPI 3.1 description of this API (webapp/server/openapi.json)."""
    return current_app.response_class(_openapi_text(), mimetype="application/json")


def _openapi_text():
    with open(os.path.join(os.path.dirname(__file__), "openapi.json"), "rb") as f:
        return f.read()


@bp.get("/options")
def options():
    presets = {name: dict(label=p["label"], about=p["about"], spec=p["spec"].to_dict(),
                          bits=p.get("bits"))
               for name, p in spec_module.PRESETS.items()}
    fields = dict(
        phase=dict(choices=list(spec_module.PHASES)),
        method=dict(choices=list(spec_module.METHODS)),
        arithmetic=dict(choices=list(spec_module.ARITHMETICS)),
        stages=dict(choices=list(spec_module.STAGE_CHOICES)),
        ripple_db=dict(min=spec_module.MIN_RIPPLE_DB, max=spec_module.MAX_RIPPLE_DB, unit="dB"),
        attenuation_db=dict(min=spec_module.MIN_ATTENUATION_DB,
                            max=spec_module.MAX_ATTENUATION_DB, unit="dB"),
        passband_fraction=dict(min=0.05, max=0.995, unit=""),
        passband_hz=dict(min=0, unit="Hz", nullable=True),
        stopband_hz=dict(min=0, unit="Hz", nullable=True),
        allow_transition_aliasing=dict(type="bool"),
    )
    return _json(dict(
        presets=presets, default_preset=spec_module.DEFAULT_PRESET, spec_fields=fields,
        float32_limit_db=spec_module.FLOAT32_LIMIT_DB,
        common_rates_hz=list(COMMON_RATES_HZ),
        rate_limits_hz=dict(min=MIN_RATE_HZ, max=MAX_RATE_HZ),
        word_lengths=list(media.WORD_LENGTHS), dithers=list(DITHERS),
        default_delivery=Delivery().to_dict(), default_format=DEFAULT_FORMAT,
        default_targets_hz=list(DEFAULT_TARGETS_HZ),
        blind_trial_counts=list(listening.BLIND_TRIAL_COUNTS),
        blind_trial_default=listening.BLIND_TRIAL_DEFAULT,
        palette=dict(figures.PALETTE),
        output_formats=list(OUTPUT_FORMAT_EXTENSIONS),
        upload_extensions=sorted(UPLOAD_EXTENSIONS),
        max_upload_bytes=current_app.config["MAX_CONTENT_LENGTH"],
        excerpt_max_s=current_app.config["EXCERPT_MAX_S"],
        rendition_min_s=listening.RENDITION_MIN_S,
        playback_preset=PLAYBACK_PRESET,
        profiles={name: p.to_dict() for name, p in PROFILES.items()},
        channel_layouts=list(CHANNEL_LAYOUTS),
        mono_laws=list(MONO_LAWS), mp3_modes=list(MP3_MODES),
    ))


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


# ---------------------------------------------------------------------------------------------
# maintenance

@bp.post("/maintenance/clear")
def clear():
    from webapp.store import clear_old
    data = json_body()
    days = number(data, "older_than_days", default=7.0, low=0.0, high=36500.0, unit="days")
    removed = clear_old(state().store.instance_path, older_than_days=days)
    return _json(dict(removed_files=removed, older_than_days=days))
