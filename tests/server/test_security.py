"""Hardening of the local server: Host (DNS rebinding), same origin + token, no CORS.

The threat model is common practice for local web servers: any page the user visits can make
the browser send requests to 127.0.0.1, and DNS rebinding points a hostile name at it.
"""

import sys

import pytest


def _post_json(client, url, *, body=None, **headers):
    return client.post(url, json=body or {}, headers=headers)


@pytest.mark.parametrize("host", ["evil.example", "rebind.example.com:8765", "127.0.0.2",
                                  "localhost.evil.example", "localhost:8765", "0.0.0.0", ""])
def test_foreign_host_header_is_refused(client, host):
    r = client.get("/api/health", headers={"Host": host})
    assert r.status_code == 403
    err = r.get_json()["error"]
    assert err["field"] == "host"
    assert "Host must be one of" in err["message"]


@pytest.mark.parametrize("host", ["localhost", "127.0.0.1", "[::1]", "LOCALHOST"])
def test_loopback_host_without_port_is_accepted_when_no_port_is_set(client, host):
    r = client.get("/api/health", headers={"Host": host})
    assert r.status_code == 200
    assert r.get_json()["status"] == "ok"


def test_host_must_carry_the_served_port(make_app):
    app = make_app(SERVER_PORT=8765)
    c = app.test_client()
    for host in ("127.0.0.1:8765", "localhost:8765", "[::1]:8765"):
        assert c.get("/api/health", headers={"Host": host}).status_code == 200
    for host in ("127.0.0.1", "localhost:8766", "attacker.example:8765", "[::1]:80"):
        r = c.get("/api/health", headers={"Host": host})
        assert r.status_code == 403, host
        assert r.get_json()["error"]["field"] == "host"


def test_host_check_covers_the_page_and_static_files(client):
    for url in ("/", "/static/vendor/plotly.min.js", "/api/options"):
        assert client.get(url, headers={"Host": "evil.example"}).status_code == 403


def test_state_changing_request_without_token_is_refused(client):
    r = _post_json(client, "/api/designs", body={"fs_in": 48000, "fs_out": 16000})
    assert r.status_code == 403
    assert r.get_json()["error"]["field"] == "token"
    assert "missing" in r.get_json()["error"]["message"]


def test_state_changing_request_with_a_wrong_token_is_refused(client, app):
    wrong = app.config["PAGE_TOKEN"][:-1] + ("A" if app.config["PAGE_TOKEN"][-1] != "A" else "B")
    for method in ("post", "put", "patch", "delete"):
        r = getattr(client, method)("/api/recordings/x", headers={"X-Rateferry-Token": wrong})
        assert r.status_code == 403, method
        assert r.get_json()["error"]["field"] == "token"


def test_token_differs_between_starts(make_app, tmp_path):
    a = make_app()
    b = make_app(instance_path=tmp_path / "other")
    assert a.config["PAGE_TOKEN"] != b.config["PAGE_TOKEN"]
    assert len(a.config["PAGE_TOKEN"]) >= 32


def test_foreign_origin_is_refused_even_with_the_token(client, headers):
    for origin in ("http://evil.example", "http://localhost:9999", "null",
                   "https://localhost"):
        r = _post_json(client, "/api/designs", body={"fs_in": 48000, "fs_out": 16000},
                       Origin=origin, **headers)
        assert r.status_code == 403, origin
        assert r.get_json()["error"]["field"] == "origin"


def test_cross_site_fetch_metadata_is_refused(client, headers):
    r = _post_json(client, "/api/designs", body={"fs_in": 48000, "fs_out": 16000},
                   **{"Sec-Fetch-Site": "cross-site"}, **headers)
    assert r.status_code == 403
    assert r.get_json()["error"]["field"] == "origin"


def test_same_origin_with_token_is_accepted(client, headers):
    body = {"fs_in": 48000, "fs_out": 16000, "preset": "quick_preview", "plans": False}
    r = _post_json(client, "/api/designs", body=body, Origin="http://localhost",
                   **{"Sec-Fetch-Site": "same-origin"}, **headers)
    assert r.status_code == 200
    assert r.get_json()["fs_out"] == 16000


def test_get_requests_need_no_token(client):
    assert client.get("/api/options").status_code == 200


def test_no_cors_headers_are_ever_sent(client, headers):
    responses = [
        client.get("/api/health", headers={"Origin": "http://evil.example"}),
        client.options("/api/designs", headers={"Origin": "http://evil.example",
                                                "Access-Control-Request-Method": "POST"}),
        client.post("/api/designs", json={}, headers={"Origin": "http://evil.example"}),
        client.get("/", headers={"Origin": "http://localhost"}),
    ]
    for r in responses:
        assert not [h for h in r.headers.keys() if h.lower().startswith("access-control-")]
    # flask-cors is installed on this machine but must never be used
    assert "flask_cors" not in sys.modules


def test_responses_carry_protective_headers(client):
    r = client.get("/")
    assert r.headers["X-Content-Type-Options"] == "nosniff"
    assert r.headers["X-Frame-Options"] == "DENY"
    assert "frame-ancestors 'none'" in r.headers["Content-Security-Policy"]
    assert r.headers["Cache-Control"] == "no-store"
