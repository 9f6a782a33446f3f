"""The listening endpoints (see openapi.json): blind trials and renditions."""

import os

from flask import Blueprint, current_app, send_file

from webapp import listening, media
from webapp.jsontools import jsonable
from webapp.dsp import spec as spec_module
from webapp.dsp.errors import ParameterError
from webapp.store import new_id

from .api import RENDITION_KINDS, _json, _url
from .conversions_api import _blind_summary, _done_or_409
from .db import get_db, state
from .errors import ApiError
from .params import (choice, conversion_or_404, integer, json_body, number, rate,
                     recording_file_or_410, recording_or_404, spec_input, while_on_disk)

__all__ = ["bp"]

bp = Blueprint("listening", __name__, url_prefix="/api")


# ---------------------------------------------------------------------------------------------
# blind trials

@bp.post("/conversions/<conversion_id>/blind_trials")
def add_blind_trials(conversion_id):
    conv = conversion_or_404(conversion_id)
    data = json_body()
    trials = integer(data, "trials", low=1, high=10000, required=True)
    correct = integer(data, "correct", low=0, high=trials, required=True)
    answers = data.get("answers") or []
    if not isinstance(answers, list) or len(answers) > trials:
        raise ParameterError(f"answers must be a list of at most {trials} items", "answers")
    for i, a in enumerate(answers):
        if not isinstance(a, dict) or a.get("x") not in ("A", "B") \
                or a.get("answer") not in ("A", "B"):
            raise ParameterError(f"answers[{i}] must be {{\"x\": \"A\"|\"B\", \"answer\": "
                                 f"\"A\"|\"B\"}}, got {a!r}", "answers")
    if len(answers) == trials:
        right = sum(a["x"] == a["answer"] for a in answers)
        if right != correct:
            raise ParameterError(f"correct must equal the right answers in answers ({right}), "
                                 f"got {correct}", "correct")
    note = data.get("note") or ""
    if not isinstance(note, str) or len(note) > 2000:
        raise ParameterError("note must be text of at most 2000 characters", "note")
    row = get_db().add_blind_trial(conversion_id=conv["id"], trials=trials, correct=correct,
                                   p_value=listening.binomial_tail(correct, trials),
                                   answers=[dict(x=a["x"], answer=a["answer"]) for a in answers],
                                   note=note)
    return _json(row, 201)


@bp.get("/conversions/<conversion_id>/blind_trials")
def list_blind_trials(conversion_id):
    conv = conversion_or_404(conversion_id)
    return _json(dict(blind_trials=get_db().list_blind_trials(conv["id"]),
                      summary=_blind_summary(conv["id"])))


# ---------------------------------------------------------------------------------------------
# listening renditions

@bp.post("/renditions")
def create_renditions():
    data = json_body()
    st = state()
    max_s = current_app.config["EXCERPT_MAX_S"]
    start_s = number(data, "start_s", default=0.0, low=0.0, unit="s")
    length_s = number(data, "length_s", default=10.0, low=listening.RENDITION_MIN_S, high=max_s,
                      unit="s")
    rate_hz = rate(data, "rate_hz")
    sample_format = choice(data, "sample_format", ("float32", "pcm24"), default="float32")
    conversion_id = data.get("conversion_id")
    if conversion_id is not None:
        conv = _done_or_409(conversion_or_404(conversion_id))
        rec = recording_file_or_410(recording_or_404(conv["recording_id"]))
        plan = st.cache.conversion_plan(spec_module.Spec(**conv["spec"]), conv["fs_in"],
                                        conv["fs_out"])
        converted = dict(path=conv["output_path"], plan=plan)
        conversion_id = conv["id"]
    else:
        rec = recording_file_or_410(recording_or_404(data.get("recording_id")))
        spec, fs_in, fs_out, _ = spec_input(data, fs_in=rec["rate_hz"])
        converted = dict(plan=st.cache.conversion_plan(spec, fs_in, fs_out))
    rid = new_id()
    with while_on_disk(rec):
        figures, paths = listening.make_renditions(
            source_path=rec["path"], probe=media.probe(rec["path"]), converted=converted,
            start_s=start_s, length_s=length_s, rate_hz=rate_hz, cache=st.cache,
            folder=st.store.renditions, rendition_id=rid, sample_format=sample_format,
            max_length_s=max_s)
    get_db().add_rendition(rendition_id=rid, recording_id=rec["id"], conversion_id=conversion_id,
                           figures=jsonable(figures), paths=paths)
    body = dict(id=rid, recording_id=rec["id"], conversion_id=conversion_id)
    body.update(figures)
    for kind in RENDITION_KINDS:
        body[kind] = dict(body[kind], url=_url("rendition_audio", id=rid, kind=kind))
    return _json(body, 201)


@bp.get("/renditions/<rendition_id>/<kind>")
def rendition_audio(rendition_id, kind):
    row = get_db().get_rendition(rendition_id)
    if row is None:
        raise ApiError(404, f"rendition {rendition_id!r} doesn't exist", "rendition_id")
    if kind not in RENDITION_KINDS:
        raise ApiError(404, f"kind must be one of {', '.join(RENDITION_KINDS)}, got {kind!r}",
                       "kind")
    path = row["paths"].get(kind)
    if not path or not os.path.isfile(path):
        raise ApiError(404, "the rendition was removed (cleared as old)", "rendition_id")
    return send_file(path, mimetype="audio/wav", conditional=True)
