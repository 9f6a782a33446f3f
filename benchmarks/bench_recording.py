"""A recording loaded in the page: upload, probe, meters, design, spectra, each timed.

Run: ``python benchmarks/bench_recording.py [--minutes 3] [--format wav|flac]`` (the runner,
``python -m benchmarks``, takes its figures from ``main()``).

The page's sequence after a file is chosen, through the real app (Flask test client, real
SQLite, real files through soundfile): POST /api/recordings (the upload; files up to 10
minutes are probed and metered before it answers, longer ones in the background), POST
/api/designs for the page's default route (the default preset, 44.1 -> 48 kHz), POST
/api/spectra, GET /api/recordings/<id>/overview (when the app has it). The parts of the upload
are also timed alone (probe, meters = loudness + true peak over the whole file).

Reference beside the total: reading the file once with soundfile (all of it, in blocks), the
least any analysis of the whole file costs. Wall and CPU seconds of this process.

Figures only; nothing here asserts a time.
"""

import argparse
import os
import sys
import tempfile
import time

import numpy as np
import soundfile as sf

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from webapp import media  # noqa: E402
from webapp.server.library import measure  # noqa: E402

RATE_HZ = 44100


def make_source(path, minutes, fmt, seed=7):
    """Stereo programme-like noise under a slow envelope, written in blocks (24-bit WAV or
    16-bit FLAC)."""
    rng = np.random.default_rng(seed)
    subtype = "PCM_24" if fmt == "wav" else "PCM_16"
    frames = int(minutes * 60 * RATE_HZ)
    block = RATE_HZ * 10
    with sf.SoundFile(path, "w", RATE_HZ, 2, subtype=subtype, format=fmt.upper()) as f:
        for a in range(0, frames, block):
            n = min(block, frames - a)
            t = (a + np.arange(n)) / RATE_HZ
            env = (0.2 + np.abs(np.sin(2 * np.pi * 0.37 * t))) ** 3
            f.write(0.1 * rng.standard_normal((n, 2)) * env[:, None])


def timed(fn):
    c0, t0 = time.process_time(), time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0, time.process_time() - c0


def page_sequence(path):
    """Wall/CPU seconds of upload, design and spectra through the app."""
    from webapp.server import create_app
    out = {}
    with tempfile.TemporaryDirectory() as inst:
        app = create_app({"TESTING": True, "LOAD_DEMO": False, "INSTANCE_PATH": inst})
        client = app.test_client()
        headers = {"X-Rateferry-Token": app.config["PAGE_TOKEN"]}
        try:
            options = client.get("/api/options").get_json()
            preset = options.get("default_preset")

            def upload():
                with open(path, "rb") as f:
                    return client.post("/api/recordings", headers=headers,
                                       data={"file": (f, os.path.basename(path))},
                                       content_type="multipart/form-data")
            r, wall, cpu = timed(upload)
            rec = r.get_json()
            if r.status_code != 201:
                raise RuntimeError(f"upload answered {r.status_code}: {rec}")
            out["upload"] = dict(wall_s=wall, cpu_s=cpu)
            deadline = time.perf_counter() + 600
            while rec.get("meters", {}).get("analysis") == "pending":   # long files
                if time.perf_counter() > deadline:
                    raise RuntimeError("the background analysis did not finish in 10 minutes")
                time.sleep(0.05)
                rec = client.get(f"/api/recordings/{rec['id']}").get_json()
            out["upload"]["analysis_wait_s"] = time.perf_counter() - deadline + 600
            route = {"recording_id": rec["id"], "fs_out": 48000, "preset": preset, "spec": {}}
            r, wall, cpu = timed(lambda: client.post("/api/designs", headers=headers,
                                                     json=dict(route, plans=False)))
            out["design"] = dict(wall_s=wall, cpu_s=cpu)
            r, wall, cpu = timed(lambda: client.post("/api/spectra", headers=headers,
                                                     json=route))
            if r.status_code != 200:
                raise RuntimeError(f"spectra answered {r.status_code}: {r.data[:300]!r}")
            out["spectra"] = dict(wall_s=wall, cpu_s=cpu)
            if "recording_overview" in options.get("urls", {}) or _has_overview(app):
                r, wall, cpu = timed(lambda: client.get(f"/api/recordings/{rec['id']}/overview"))
                if r.status_code != 200:
                    raise RuntimeError(f"overview answered {r.status_code}: {r.data[:300]!r}")
                out["overview"] = dict(wall_s=wall, cpu_s=cpu)
        finally:
            app.extensions["rateferry"].shutdown()
    return out


def _has_overview(app):
    return any(rule.rule.endswith("/overview") for rule in app.url_map.iter_rules())


def parts(path):
    info, w_probe, c_probe = timed(lambda: media.probe(path))
    _, w_meter, c_meter = timed(lambda: measure(path, info))

    def read_all():
        for _ in media.read_blocks(path):
            pass
    _, w_read, c_read = timed(read_all)
    return dict(probe=dict(wall_s=w_probe, cpu_s=c_probe),
                meters=dict(wall_s=w_meter, cpu_s=c_meter),
                read=dict(wall_s=w_read, cpu_s=c_read))


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python benchmarks/bench_recording.py",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=3.0, help="recording length, default 3")
    ap.add_argument("--format", choices=("wav", "flac"), default="wav",
                    help="24-bit WAV (default) or 16-bit FLAC")
    ap.add_argument("--tmp", default=None, help="folder for the temporary file")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=args.tmp) as tmp:
        path = os.path.join(tmp, f"programme.{args.format}")
        make_source(path, args.minutes, args.format)
        size_mb = os.path.getsize(path) / 1e6
        seq = page_sequence(path)
        alone = parts(path)
    total = sum(v["wall_s"] for v in seq.values()) + seq["upload"]["analysis_wait_s"]
    total_cpu = sum(v["cpu_s"] for v in seq.values())
    target = "< 1 s" if args.minutes <= 3 else ("< 8 s" if args.minutes >= 60 else None)
    ref = "reading the file once"
    rows = [dict(name="page sequence, wall", value=total, unit="s", reference=ref,
                 reference_value=alone["read"]["wall_s"], **({"target": target} if target else {})),
            dict(name="page sequence, CPU", value=total_cpu, unit="s", reference=ref,
                 reference_value=alone["read"]["cpu_s"])]
    for key, label in (("upload", "upload (probe + meters when <= 10 min)"),
                       ("design", "design of the default route"), ("spectra", "spectra"),
                       ("overview", "overview")):
        if key in seq:
            rows.append(dict(name=f"  {label}, wall", value=seq[key]["wall_s"], unit="s"))
    for key in ("probe", "meters"):
        rows.append(dict(name=f"  {key} alone, CPU", value=alone[key]["cpu_s"], unit="s",
                         reference=ref, reference_value=alone["read"]["cpu_s"]))
    title = (f"{args.minutes:g} min stereo {RATE_HZ} Hz "
             f"{'24-bit WAV' if args.format == 'wav' else '16-bit FLAC'} ({size_mb:.1f} MB) "
             f"loaded in the page{'' if 'overview' in seq else ' (no overview endpoint)'}")
    return dict(title=title, figures=rows, sequence=seq, alone=alone,
                load_average=list(os.getloadavg()))


if __name__ == "__main__":
    from run import print_result   # noqa: E402 (benchmarks/run.py beside this file)
    res = main(sys.argv[1:])
    print_result("recording", res)
    print("load average (1, 5, 15 min): " + ", ".join(f"{v:.2f}" for v in res["load_average"]))
