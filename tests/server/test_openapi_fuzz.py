"""The OpenAPI description against the running app: generated requests, no 5xx, the schema kept.

schemathesis (a property-based fuzzer built on Hypothesis) reads webapp/server/openapi.json and
generates requests for every operation - valid ones (positive) and ones that break the schema
(negative) - against a real waitress server on 127.0.0.1. Each answer must be below 500, an
error must be JSON ``{"error": {"message", "field"}}`` with a message, and every answer must
conform to the description (status code, content type, body schema). Path and body ids are
sometimes swapped for real ones (an uploaded recording, a finished conversion, a design), so
the fuzzer reaches past the 404s. The number of examples per operation is bounded so the whole
run stays near a minute on a busy two-core machine.
"""

import io
import json
import os

import hypothesis
import numpy as np
import schemathesis
import soundfile as sf
from hypothesis import HealthCheck, Phase, given, settings, strategies as st
from schemathesis.checks import (content_type_conformance, not_a_server_error,
                                 response_schema_conformance, status_code_conformance)

import webapp.server

SCHEMA_PATH = os.path.join(os.path.dirname(webapp.server.__file__), "openapi.json")
#: Requests per operation and mode; the slow ones (a design, an audit) get fewer.
EXAMPLES = 10
SLOW_EXAMPLES = 4
SLOW = {"POST /api/designs", "POST /api/audits", "POST /api/spectra", "POST /api/renditions",
        "POST /api/conversions", "GET /api/designs/{id}", "GET /api/designs/{id}/plans"}
CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_schema_conformance]


def _known_ids(app, base, token, tone_bytes):
    """A recording, a finished conversion and a design, made through the API itself."""
    client = app.test_client()
    h = {"X-Rateferry-Token": token}
    rec = client.post("/api/recordings", headers=h, base_url=base,
                      data={"file": (io.BytesIO(tone_bytes), "fuzz.wav")},
                      content_type="multipart/form-data").get_json()
    conv = client.post("/api/conversions", headers=h, base_url=base,
                       json={"recording_id": rec["id"], "fs_out": 48000,
                             "preset": "quick_preview"}).get_json()
    app.extensions["rateferry"].pool.wait(conv["id"], timeout=120)
    design = client.post("/api/designs", headers=h, base_url=base,
                         json={"fs_in": 44100, "fs_out": 48000, "plans": False}).get_json()
    return dict(recording_id=rec["id"], conversion_id=conv["id"], design_id=design["id"])


def _with_known_ids(case, ids, pick):
    """Swap generated ids for real ones (``pick`` draws which, or None to keep)."""
    if case.path_parameters and "id" in case.path_parameters:
        path = case.operation.path
        kind = ("conversion_id" if "/conversions/" in path else
                "design_id" if "/designs/" in path else
                "recording_id" if "/recordings/" in path else None)
        if kind and pick(kind):
            case.path_parameters["id"] = ids[kind]
    if isinstance(case.body, dict):
        for key in ("recording_id", "conversion_id", "design_id"):
            if key in case.body and pick(key):
                case.body[key] = ids[key]
        for key in ("reference_id", "track_id"):     # the time base pair: recordings too
            if key in case.body and pick(key):
                case.body[key] = ids["recording_id"]
    return case


def test_every_operation_survives_generated_requests(live_server):
    schema = schemathesis.openapi.from_dict(json.load(open(SCHEMA_PATH)))
    # the demo recording is left out: DELETE must not remove files outside the instance
    app, base = live_server(SSE_MAX_S=0.5, EXCERPT_MAX_S=5.0)
    token = app.config["PAGE_TOKEN"]
    buf = io.BytesIO()
    t = np.arange(44100) / 44100.0
    sf.write(buf, 0.25 * np.sin(2 * np.pi * 1000.0 * t), 44100, format="WAV", subtype="PCM_16")
    ids = _known_ids(app, base, token, buf.getvalue())
    # the served description is the packaged one
    served = app.test_client().get("/api/openapi.json", base_url=base)
    assert served.status_code == 200 and served.get_json() == json.load(open(SCHEMA_PATH))

    counts = {}
    for result in schema.get_all_operations():
        operation = result.ok()
        label = f"{operation.method.upper()} {operation.path}"
        n = SLOW_EXAMPLES if label in SLOW else EXAMPLES
        for mode in (schemathesis.GenerationMode.POSITIVE, schemathesis.GenerationMode.NEGATIVE):
            strategy = operation.as_strategy(generation_mode=mode)

            @settings(max_examples=n, deadline=None, database=None, derandomize=True,
                      phases=[Phase.generate], suppress_health_check=list(HealthCheck),
                      verbosity=hypothesis.Verbosity.quiet)
            @given(case=strategy, data=st.data())
            def run(case, data):
                pick = lambda key: data.draw(st.booleans(), label=key)   # noqa: E731
                case = _with_known_ids(case, ids, pick)
                response = case.call(base_url=base, headers={"X-Rateferry-Token": token},
                                     timeout=120)
                counts[label] = counts.get(label, 0) + 1
                assert response.status_code < 500, (label, response.status_code,
                                                    response.text[:300])
                if response.status_code >= 400:
                    body = response.json()
                    assert isinstance(body["error"]["message"], str) and body["error"]["message"]
                if mode is schemathesis.GenerationMode.POSITIVE or response.status_code < 400:
                    case.validate_response(response, checks=CHECKS)
                else:   # a request that breaks the schema may be answered by any 4xx error
                    case.validate_response(response, checks=[not_a_server_error,
                                                             content_type_conformance])

            try:
                run()
            except hypothesis.errors.Unsatisfiable:
                # nothing to break in this operation's schema (no parameters, no body)
                assert mode is schemathesis.GenerationMode.NEGATIVE, label
    total = sum(counts.values())
    print(f"\nfuzz: {total} requests over {len(counts)} operations: "
          + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))
    described = json.load(open(SCHEMA_PATH))["paths"]
    operations = sum(1 for ops in described.values() for m in ops if m != "parameters")
    assert operations >= 33 and len(counts) == operations   # every operation was exercised
    assert total >= 300


def test_the_description_covers_every_api_route(app):
    described = json.load(open(SCHEMA_PATH))["paths"]
    routes = set()
    for rule in app.url_map.iter_rules():
        if rule.rule.startswith("/api/"):
            path = rule.rule.replace("<", "{").replace(">", "}")
            path = path.replace("{recording_id}", "{id}").replace("{conversion_id}", "{id}") \
                .replace("{design_id}", "{id}").replace("{rendition_id}", "{id}") \
                .replace("{batch_id}", "{id}")
            for method in rule.methods - {"HEAD", "OPTIONS"}:
                routes.add((path, method.lower()))
    documented = {(p, m) for p, ops in described.items() for m in ops if m != "parameters"}
    assert routes == documented
