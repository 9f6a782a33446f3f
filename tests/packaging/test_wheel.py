"""A plain (non-editable) install works: the wheel carries the page, plotly.js and the demo.

Builds the wheel with pip, installs it into a fresh virtual environment outside the source tree
(the dependencies come from this interpreter's site-packages, so no download is needed), starts
`rateferry serve` from that environment in an empty folder, and fetches the page, its entry
module, plotly.js and the list of recordings (the demo must be there).
"""

import json
import os
import re
import socket
import subprocess
import sys
import time
import urllib.request
import zipfile

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(url, headers=None):
    req = urllib.request.Request(url, headers=headers or {})
    with urllib.request.urlopen(req, timeout=10) as r:
        return r.status, r.headers.get("Content-Type", ""), r.read()


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps",
                    "-w", str(out), ROOT], check=True, cwd=str(out), timeout=300)
    (path,) = [p for p in out.iterdir() if p.suffix == ".whl"]
    return path


def test_the_wheel_carries_the_page_and_the_demo(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    for need in ("webapp/static/js/main.js", "webapp/static/css/rateferry.css",
                 "webapp/demo_media/harbour_interview_44k1.flac",
                 "webapp/schemas/recipe.schema.json", "webapp/server/templates/index.html",
                 "webapp/sheet_assets/sheet.css", "webapp/sheet_assets/sheet.js"):
        assert need in names, need
    assert not any(n.startswith(("tests/", "static/", "demo_media/")) for n in names)


def test_an_installed_wheel_serves_the_page_plotly_and_the_demo(wheel, tmp_path):
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--system-site-packages", str(venv)],
                   check=True, timeout=120)
    py = venv / "bin" / "python"
    subprocess.run([str(py), "-m", "pip", "install", "-q", "--no-deps", "--no-index",
                    "--force-reinstall", str(wheel)], check=True, timeout=300)
    work = tmp_path / "elsewhere"
    work.mkdir()
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH",)}
    env.update(HOME=str(tmp_path / "home"), RATEFERRY_INSTANCE=str(tmp_path / "instance"))
    where = subprocess.run([str(py), "-c", "import webapp, webapp.assets as a; "
                            "print(webapp.__file__); print(a.STATIC_FOLDER)"],
                           cwd=str(work), env=env, capture_output=True, text=True, check=True)
    module_file, static = where.stdout.split()
    assert module_file.startswith(str(venv)) and static.startswith(str(venv)), where.stdout
    port = _free_port()
    server = subprocess.Popen([str(venv / "bin" / "rateferry"), "serve", "--no-browser",
                               "--port", str(port)], cwd=str(work), env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                status, _, page = _get(base + "/")
                break
            except OSError:
                assert server.poll() is None, server.stdout.read().decode()
                assert time.monotonic() < deadline, "the server did not start"
                time.sleep(0.3)
        assert status == 200 and b"Rateferry" in page
        status, kind, body = _get(base + "/static/js/main.js")
        assert status == 200 and "javascript" in kind and b"import" in body
        status, _, body = _get(base + "/static/vendor/plotly.min.js")
        assert status == 200 and len(body) > 1_000_000
        token = re.search(rb'"token"\s*:\s*"([^"]+)"', page) or \
            re.search(rb'data-token="([^"]+)"', page)
        headers = {"X-Rateferry-Token": token.group(1).decode()} if token else {}
        deadline = time.monotonic() + 60
        while True:
            _, _, body = _get(base + "/api/recordings", headers)
            names = [r["name"] for r in json.loads(body)["recordings"]]
            if "harbour_interview_44k1.flac" in names or time.monotonic() > deadline:
                break
            time.sleep(0.3)
        assert "harbour_interview_44k1.flac" in names
    finally:
        server.terminate()
        server.wait(timeout=30)
