"""The JSON API (see API.md). Views parse, call the core or the store, and serialise."""

import json
import os
import re

from flask import Blueprint, current_app, request

from webapp import __version__, media
from webapp.jsontools import jsonable
from webapp.dsp import spec as spec_module
from webapp.dsp.errors import ParameterError
from webapp.dsp.rates import MAX_RATE_HZ, MIN_RATE_HZ
from webapp.delivery import CHANNEL_LAYOUTS, DITHERS, MONO_LAWS, MP3_MODES, Delivery
from webapp.profiles import PROFILES

from webapp import figures, listening
from webapp.designs import PLAYBACK_PRESET, design_key
from .db import get_db, state
from .params import json_body, number
from .uploads import UPLOAD_EXTENSIONS, display_name

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
# maintenance

@bp.post("/maintenance/clear")
def clear():
    from webapp.store import clear_old
    data = json_body()
    days = number(data, "older_than_days", default=7.0, low=0.0, high=36500.0, unit="days")
    removed = clear_old(state().store.instance_path, older_than_days=days)
    return _json(dict(removed_files=removed, older_than_days=days))
