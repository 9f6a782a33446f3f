"""Soak: minutes of mixed traffic against one `rateferry serve` on loopback (not a test).

Starts the server in a subprocess on a free port over a fresh instance folder, then drives it
from a few client threads with a mix of uploads, designs, conversions (some cancelled, some
followed by their progress stream), renditions, downloads and plain reads, for the given
minutes. Prints, and writes as JSON with --json: requests served, errors (any 5xx, any
refused connection, any 4xx the mix did not expect), the server's resident memory (RSS) and
peak RSS a little after the start and at the end, and its open file descriptors at the end.

    python benchmarks/soak_server.py                # 2 minutes
    python benchmarks/soak_server.py --minutes 30   # the full soak

Memory should not grow between the early and the final figures once caches are full (the
design cache holds DESIGN_CACHE_SIZE designs, the results cache 32 conversions); open file
descriptors should stay near their count at start.
"""

import argparse
import http.client
import io
import json
import os
import random
import re
import socket
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np
import soundfile as sf

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
EXPECTED_4XX = {404, 409, 410, 429}


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _proc_figures(pid):
    """RSS, peak RSS (MiB) and open descriptors of ``pid`` from /proc (Linux)."""
    out = {}
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(("VmRSS:", "VmHWM:")):
                out[line.split(":")[0]] = int(line.split()[1]) / 1024.0
    return dict(rss_mib=round(out.get("VmRSS", 0.0), 1), peak_rss_mib=round(out.get("VmHWM", 0.0), 1),
                open_fds=len(os.listdir(f"/proc/{pid}/fd")))


def _wav(seconds, rate, rng):
    t = np.arange(int(seconds * rate)) / rate
    x = 0.2 * np.sin(2 * np.pi * rng.uniform(200, 4000) * t)[:, None] \
        + 0.01 * rng.standard_normal((t.size, 2))
    buf = io.BytesIO()
    sf.write(buf, x, rate, format="WAV", subtype="PCM_24")
    return buf.getvalue()


class Client:
    """One keep-alive connection; counts what it sends and what comes back."""

    def __init__(self, port, token, stats):
        self.port, self.token, self.stats = port, token, stats
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=300)

    def request(self, method, url, body=None, content_type=None, expect=(200, 201, 202)):
        headers = {"X-Rateferry-Token": self.token} if method != "GET" else {}
        if content_type:
            headers["Content-Type"] = content_type
        try:
            self.conn.request(method, url, body=body, headers=headers)
            r = self.conn.getresponse()
            data = r.read()
        except (OSError, http.client.HTTPException) as exc:
            self.stats.add(error=f"{method} {url.split('?')[0]}: {type(exc).__name__}")
            self.conn.close()
            self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=300)
            return None, None
        bad = r.status >= 500 or (r.status >= 400 and r.status not in expect
                                  and r.status not in EXPECTED_4XX)
        self.stats.add(error=f"{method} {_route(url)}: {r.status} {data[:160]!r}" if bad else None)
        ctype = r.getheader("Content-Type") or ""
        return r.status, (json.loads(data) if ctype.startswith("application/json") else data)

    def json(self, method, url, obj, **kw):
        return self.request(method, url, json.dumps(obj).encode(), "application/json", **kw)

    def upload(self, name, data):
        boundary = "soak" + os.urandom(8).hex()
        body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
                f"filename=\"{name}\"\r\nContent-Type: audio/wav\r\n\r\n").encode() + data + \
            f"\r\n--{boundary}--\r\n".encode()
        return self.request("POST", "/api/recordings", body,
                            f"multipart/form-data; boundary={boundary}")

    def stream(self, url, limit_s):
        """Read a progress stream on its own connection until it ends (or ``limit_s``)."""
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=12)
        try:
            conn.request("GET", url)
            r = conn.getresponse()
            if r.status == 200:
                deadline = time.monotonic() + limit_s
                try:
                    while time.monotonic() < deadline and r.read1(65536):
                        pass
                except TimeoutError:
                    pass   # a quiet stream (the server writes at least every 10 s)
            else:
                r.read()
            self.stats.add(error=None if r.status in (200, 429) else f"GET events: {r.status}")
        except OSError as exc:
            self.stats.add(error=f"GET events: {type(exc).__name__}")
        finally:
            conn.close()


def _route(url):
    return re.sub(r"/[A-Za-z0-9_-]{16,}", "/<id>", url.split("?")[0])


class Stats:
    def __init__(self):
        self.lock = threading.Lock()
        self.requests = 0
        self.errors = []

    def add(self, error=None):
        with self.lock:
            self.requests += 1
            if error:
                self.errors.append(error)


def worker(client, rng, stop, recordings):
    rates = (22050, 32000, 44100, 48000, 88200, 96000)
    presets = ("quick_preview", "spoken_word_delivery", "music_delivery")
    while not stop.is_set():
        action = rng.choice(["upload", "design", "convert", "cancel", "rendition", "read",
                             "spectra", "delete"], p=[0.08, 0.2, 0.15, 0.1, 0.12, 0.2, 0.1, 0.05])
        if action == "upload" or not recordings:
            rate = int(rng.choice((44100, 48000)))
            status, body = client.upload(f"take{rng.integers(1e6)}.wav",
                                         _wav(rng.uniform(1, 6), rate, rng))
            if status == 201:
                recordings.append(body["id"])
        elif action == "design":
            fs_in, fs_out = (int(r) for r in rng.choice(rates, 2, replace=False))
            client.json("POST", "/api/designs", {"fs_in": fs_in, "fs_out": fs_out,
                                                  "preset": str(rng.choice(presets)),
                                                  "plans": bool(rng.random() < 0.3)})
        elif action in ("convert", "cancel"):
            rid = random.choice(recordings)
            status, conv = client.json("POST", "/api/conversions", {
                "recording_id": rid, "fs_out": int(rng.choice(rates)),
                "preset": str(rng.choice(presets)), "format": str(rng.choice(("flac", "wav"))),
                "delivery": {"bits": "24", "ceiling_dbtp": -1.0 if rng.random() < 0.3 else None}})
            if status != 202:
                continue
            if action == "cancel":
                client.json("POST", f"/api/conversions/{conv['id']}/cancel", {})
            else:
                client.stream(f"/api/conversions/{conv['id']}/events", limit_s=20)
                status, final = client.request("GET", f"/api/conversions/{conv['id']}")
                if status == 200 and final["status"] == "done":
                    client.request("GET", f"/api/conversions/{conv['id']}/download")
                    client.request("GET", f"/api/conversions/{conv['id']}/recipe")
        elif action == "rendition":
            rid = random.choice(recordings)
            status, body = client.json("POST", "/api/renditions", {
                "recording_id": rid, "fs_out": 48000, "rate_hz": 48000, "start_s": 0.0,
                "length_s": 1.0, "preset": "quick_preview"})
            if status == 201:
                client.request("GET", f"/api/renditions/{body['id']}/difference")
        elif action == "spectra":
            client.json("POST", "/api/spectra", {"recording_id": random.choice(recordings),
                                                 "fs_out": 32000, "preset": "quick_preview"})
        elif action == "delete" and len(recordings) > 4:
            rid = recordings.pop(0)
            client.request("DELETE", f"/api/recordings/{rid}")
        else:
            client.request("GET", str(rng.choice(["/api/health", "/api/options",
                                                  "/api/recordings", "/api/conversions"])))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=2.0, help="duration (default 2; 30 for "
                    "the full soak)")
    ap.add_argument("--clients", type=int, default=4, help="client threads (default 4)")
    ap.add_argument("--json", help="write the figures to this file too")
    args = ap.parse_args(argv)

    instance = tempfile.mkdtemp(prefix="rateferry-soak-")
    port = _free_port()
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""),
               RATEFERRY_STATE_DIR=os.path.join(instance, "state"))
    log_path = os.path.join(instance, "server.log")
    log = open(log_path, "wb")
    server = subprocess.Popen(
        [sys.executable, "-c", "import sys; from webapp.cli import main; sys.exit(main())",
         "serve", "--port", str(port), "--no-browser", "--instance", instance],
        env=env, stdout=subprocess.DEVNULL, stderr=log)
    try:
        page = None
        for _ in range(600):
            try:
                conn = http.client.HTTPConnection("127.0.0.1", port, timeout=5)
                conn.request("GET", "/")
                page = conn.getresponse().read().decode()
                break
            except OSError:
                time.sleep(0.1)
        if page is None:
            raise SystemExit("the server did not start; see " + log_path)
        token = re.search(r'"token":\s*"([^"]+)"', page).group(1)
        print(f"server pid {server.pid} on port {port}; instance {instance}", flush=True)
        stats, stop = Stats(), threading.Event()
        recordings = []
        threads = [threading.Thread(target=worker, args=(Client(port, token, stats),
                                                         np.random.default_rng(i), stop,
                                                         recordings), daemon=True)
                   for i in range(args.clients)]
        t0 = time.monotonic()
        for t in threads:
            t.start()
        time.sleep(min(20.0, args.minutes * 60 / 6))
        early = _proc_figures(server.pid)
        early["at_s"] = round(time.monotonic() - t0, 1)
        series = [dict(at_s=early["at_s"], rss_mib=early["rss_mib"])]
        # RSS every 30 s: a cache filling up to its bound levels off, a leak keeps climbing
        while time.monotonic() - t0 < args.minutes * 60:
            time.sleep(min(30.0, max(0.0, args.minutes * 60 - (time.monotonic() - t0))))
            series.append(dict(at_s=round(time.monotonic() - t0, 1),
                               rss_mib=_proc_figures(server.pid)["rss_mib"]))
        stop.set()
        for t in threads:
            t.join(timeout=120)
        time.sleep(2.0)   # let queued conversions and streams settle
        end = _proc_figures(server.pid)
        end["at_s"] = round(time.monotonic() - t0, 1)
        figures = dict(minutes=args.minutes, clients=args.clients,
                       requests=stats.requests, errors=len(stats.errors),
                       error_examples=sorted(set(stats.errors))[:10], start=early, end=end,
                       rss_series=series,
                       requests_per_s=round(stats.requests / (end["at_s"]), 2))
    finally:
        server.terminate()
        try:
            server.wait(timeout=30)
        except subprocess.TimeoutExpired:
            server.kill()
        log.close()
    print(f"soak {args.minutes:g} min, {args.clients} clients: {figures['requests']} requests "
          f"({figures['requests_per_s']}/s), {figures['errors']} errors")
    print(f"  server after {early['at_s']} s: RSS {early['rss_mib']} MiB, peak "
          f"{early['peak_rss_mib']} MiB, {early['open_fds']} open fds")
    print(f"  server at the end ({end['at_s']} s): RSS {end['rss_mib']} MiB, peak "
          f"{end['peak_rss_mib']} MiB, {end['open_fds']} open fds")
    print("  RSS over time (s: MiB): " + ", ".join(f"{p['at_s']:.0f}: {p['rss_mib']:.0f}"
                                                 for p in figures["rss_series"]))
    for e in figures["error_examples"]:
        print(f"  error: {e}")
    print(f"  server log: {log_path}")
    if args.json:
        with open(args.json, "w") as f:
            json.dump(figures, f, indent=2)
    return 0 if figures["errors"] == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
