"""The design endpoints (see openapi.json): estimates, designs and their plans, audits, spectra."""

import time

from flask import Blueprint, current_app, request

from webapp import media
from webapp.jsontools import jsonable
from webapp.dsp.errors import RateferryError
from webapp.delivery import DITHERS
from webapp.designs import design_estimate

from .api import _bool, _json, _store_design, _url
from . import spectra_ahead
from .db import state
from .params import (choice, integer, json_body, recording_file_or_410, recording_or_404,
                     spec_input, while_on_disk)

__all__ = ["bp"]

bp = Blueprint("designs", __name__, url_prefix="/api")


# ---------------------------------------------------------------------------------------------
# designs, audits, spectra



def _design_body(spec, fs_in, fs_out, design_id, want_plans, t0):
    cache = state().cache
    cache.hold_plans()
    view, cached = cache.view(spec, fs_in, fs_out)
    if design_id is None:
        design_id = _store_design(spec, fs_in, fs_out, view["figures"])
    body = dict(id=design_id)
    body.update(view)
    body["plans_url"] = _url("design_plans", id=design_id)
    if want_plans:
        # the plans start only now, so they don't slow the design itself down
        plans, plans_cached = _plans_or_error(cache.plans_async(spec, fs_in, fs_out))
        cached = cached and plans_cached
        body["plans"] = plans
    body["timing"] = dict(design_ms=view["figures"]["design_ms"],
                          total_ms=(time.perf_counter() - t0) * 1000.0, cached=cached)
    return body


def _plans_or_error(future):
    try:
        return future.result()
    except RateferryError as exc:
        return dict(single=None, options=[], chosen=None,
                    error=dict(message=exc.message, field=exc.field)), False




def _spec_of(data):
    """(spec, fs_in, fs_out, design_id) of a request; fs_in from its recording when it names
    one."""
    fs_in = None
    if data.get("recording_id") is not None:
        fs_in = recording_or_404(data["recording_id"])["rate_hz"]
    return spec_input(data, fs_in=fs_in)


@bp.post("/estimates")
def estimate_design():
    """What a design would cost, from the order formulas, before designing it."""
    data = json_body()
    spec, fs_in, fs_out, _ = _spec_of(data)
    return _json(design_estimate(spec, fs_in, fs_out))


@bp.post("/designs")
def create_design():
    t0 = time.perf_counter()
    data = json_body()
    spec, fs_in, fs_out, design_id = _spec_of(data)
    want = _bool(data, "plans", True)
    return _plans_after(_json(_design_body(spec, fs_in, fs_out, design_id, want, t0), clean=True),
                        want, spec, fs_in, fs_out)


@bp.get("/designs/<design_id>")
def get_design(design_id):
    t0 = time.perf_counter()
    spec, fs_in, fs_out, design_id = spec_input({"design_id": design_id})
    want = request.args.get("plans", "true").lower() not in ("0", "false", "no")
    return _plans_after(_json(_design_body(spec, fs_in, fs_out, design_id, want, t0), clean=True),
                        want, spec, fs_in, fs_out)


def _plans_after(response, want_plans, spec, fs_in, fs_out):
    """Without the plans in the body, start them once the response has gone out and the
    designs have rested (live edits: each would take the second core for half a second while
    the page draws and the next design is made); GET /api/designs/<id>/plans starts them at
    once if they are not ready."""
    if not want_plans:
        cache = state().cache
        response.call_on_close(lambda: cache.plans_after_rest(spec, fs_in, fs_out))
    return response


@bp.get("/designs/<design_id>/plans")
def get_design_plans(design_id):
    t0 = time.perf_counter()
    spec, fs_in, fs_out, design_id = spec_input({"design_id": design_id})
    plans, cached = _plans_or_error(state().cache.plans_async(spec, fs_in, fs_out))
    return _json(dict(id=design_id, plans=plans,
                      timing=dict(total_ms=(time.perf_counter() - t0) * 1000.0, cached=cached)))


@bp.post("/audits")
def create_audit():
    t0 = time.perf_counter()
    data = json_body()
    spec, fs_in, fs_out, design_id = _spec_of(data)
    dither = choice(data, "dither", DITHERS, default="none")
    seed = integer(data, "seed", default=0, low=0, high=2**63 - 1)
    from webapp.dsp.audit import audit
    cache = state().cache
    plan = cache.route_plan(spec, fs_in, fs_out)
    if design_id is None:
        design_id = _store_design(spec, fs_in, fs_out, plan.figures())
    figures, cached = cache.memo("audit", (spec, fs_in, fs_out, dither, seed),
                                 lambda: jsonable(audit(plan, dither=dither,
                                                        seed=seed).figures()))
    return _json(dict(design_id=design_id, figures=figures,
                      timing=dict(audit_ms=(time.perf_counter() - t0) * 1000.0, cached=cached)))


@bp.post("/spectra")
def create_spectra():
    data = json_body()
    rec = recording_file_or_410(recording_or_404(data.get("recording_id")))
    ask = spectra_ahead.read_ask(data, rec["rate_hz"])
    cache = state().cache
    plan = cache.route_plan(ask.spec, ask.fs_in, ask.fs_out)
    design_id = ask.design_id
    if design_id is None:
        design_id = _store_design(ask.spec, ask.fs_in, ask.fs_out, plan.figures())
    with while_on_disk(rec):
        info = media.probe(rec["path"])
        # spectra started with the upload are taken as they are (or waited for)
        view, cached = cache.memo(
            spectra_ahead.KIND, spectra_ahead.cache_key(rec["id"], ask),
            lambda: spectra_ahead.compute(plan, rec["path"], info, ask,
                                          current_app.config["EXCERPT_MAX_S"]))
    body = dict(view, design_id=design_id, recording_id=rec["id"],
                meets_mask=bool(plan.meets_mask), cached=cached)
    return _json(body)
