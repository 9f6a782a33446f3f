"""A recording loaded in the page: probe, meters, spectra and overview, and where the time goes.

Run: ``python benchmarks/bench_recording.py [--minutes 3] [--format wav|flac] [--parts]
[--separate] [--page]`` (the runner, ``python -m benchmarks``, takes its figures from
``main()``).
The hour of the speed figures: ``--minutes 60 --format flac`` (heavy: run it once or twice).

The page's sequence after a file is chosen, through the real app (Flask test client, real
SQLite, real files through soundfile; the server's threads in this process):

1. POST /api/recordings with the page's overview width (form field ``columns``) and its route
   (form field ``spectra``): the file is stored and probed; files up to 10 minutes are read
   once before the answer for the meters (BS.1770 loudness, 16x true peak) and the overview,
   longer ones in the background; the route's spectra run beside that read;
2. then, at once: POST /api/spectra (answered from the spectra computed beside the upload);
   GET /api/recordings/<id>/overview (it answers from the upload's read, or waits for the
   background one); GET /api/recordings/<id> until the meters are in (a long file); and POST
   /api/designs for the default route (44.1 -> 48 kHz, the default preset), as a page whose
   last design was for another rate asks (the page keeps the design it shows for a recording
   at the same rate).

"Ready" is when the meters, the spectra and the overview are all in: the target is 1 s for a
3-minute file, 8 s for an hour. ``--separate`` also runs the sequence the page had before the
one read (the upload without ``columns`` nor ``spectra``: its meters read the file, then the
overview reads it again; the spectra asked for after the design), for a before/after in one
run. ``--parts`` (default for files up to 10 minutes) times
the parts of the one read alone, one after the other on one thread: reading the file, the
meters (BS.1770 loudness and true peak, as measure_file), the overview's columns, the search
for overs (in the same read, from where the meter's running true peak first reads over 0 dBTP;
none when it stays under); and beside them the two separate reads of before. ``--page`` also
loads the file in the real page (Debian's chromium through Playwright, the real server on a
loopback port): from choosing the file to its figures, its overview and its spectra drawn (with
the design's filter gain), and where that time went: the upload's body sent, each request as
the browser saw it, each plot drawn; ``--page-runs N`` loads it N times.

Reference beside each figure: reading the file once with soundfile (all of it, in blocks), the
least any analysis of the whole file costs. Wall and CPU seconds of this process (CPU counts
every thread). Figures only; nothing here asserts a time.
"""

import argparse
import os
import sys
import tempfile
import threading
import time

import numpy as np
import soundfile as sf
from threadpoolctl import threadpool_limits

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from benchmarks import browser  # noqa: E402
from webapp import media  # noqa: E402
from webapp.overview import overview  # noqa: E402
from webapp.pipeline import Meters, measure_file  # noqa: E402

RATE_HZ = 44100
#: The page's overview width in the benchmark (the page sends its plot's width in pixels).
COLUMNS = 1200
_BLOCK = 1 << 17
#: How often the sequence asks whether a long file's meters are in.
POLL_S = 0.1


def make_source(path, minutes, fmt, seed=7, gain_db=0.0):
    """Stereo programme-like noise under a slow envelope, written in blocks (24-bit WAV or
    16-bit FLAC); its true peak is about +0.01 dBTP (a few overs), plus ``gain_db``."""
    rng = np.random.default_rng(seed)
    subtype = "PCM_24" if fmt == "wav" else "PCM_16"
    frames = int(minutes * 60 * RATE_HZ)
    block = RATE_HZ * 10
    with sf.SoundFile(path, "w", RATE_HZ, 2, subtype=subtype, format=fmt.upper()) as f:
        for a in range(0, frames, block):
            n = min(block, frames - a)
            t = (a + np.arange(n)) / RATE_HZ
            env = (0.2 + np.abs(np.sin(2 * np.pi * 0.37 * t))) ** 3
            f.write(0.1 * 10 ** (gain_db / 20) * rng.standard_normal((n, 2)) * env[:, None])


def timed(fn):
    c0, t0 = time.process_time(), time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0, time.process_time() - c0


class _Steps:
    """Start and end of each step of the sequence, from one origin, across threads."""

    def __init__(self):
        self.t0 = time.perf_counter()
        self.spans = {}

    def run(self, name, fn):
        a = time.perf_counter()
        out = fn()
        self.spans[name] = (a - self.t0, time.perf_counter() - self.t0)
        return out


def page_sequence(path, *, columns):
    """The page's requests after a file is chosen; ``columns=None``: the sequence before the
    one read (the upload only measures, the overview reads the file again, the spectra are
    asked for after the design)."""
    import json
    from webapp.server import create_app
    with tempfile.TemporaryDirectory() as inst:
        app = create_app({"TESTING": True, "LOAD_DEMO": False, "INSTANCE_PATH": inst})
        headers = {"X-Rateferry-Token": app.config["PAGE_TOKEN"]}
        try:
            preset = app.test_client().get("/api/options").get_json()["default_preset"]
            route = {"fs_out": 48000, "preset": preset, "spec": {}}
            c0 = time.process_time()
            steps = _Steps()
            # the page sends its route with the file: the spectra run beside the analysis
            ahead = None if columns is None else json.dumps(dict(route, log_axis=False))
            rec = steps.run("upload", lambda: _upload(app, headers, path, columns, ahead))
            out = dict(overview_seconds=None)
            route["recording_id"] = rec["id"]

            def design():
                _ok(steps.run("design", lambda: app.test_client().post(
                    "/api/designs", headers=headers, json=dict(route, plans=False))))

            def spectra():
                _ok(steps.run("spectra", lambda: app.test_client().post(
                    "/api/spectra", headers=headers, json=dict(route, log_axis=False))))

            def design_then_spectra():
                design()
                spectra()

            def picture():
                query = f"?columns={columns or COLUMNS}"
                body = _ok(steps.run("overview", lambda: app.test_client().get(
                    f"/api/recordings/{rec['id']}/overview{query}")))
                out.update(overview_seconds=body["seconds"], overview_cached=body["cached"])

            def meters():
                client = app.test_client()
                deadline = time.perf_counter() + 900
                now = rec
                a = time.perf_counter()
                while now["analysis"] == "pending":
                    if time.perf_counter() > deadline:
                        raise RuntimeError("the background analysis did not finish in 15 min")
                    time.sleep(POLL_S)
                    now = client.get(f"/api/recordings/{rec['id']}").get_json()
                steps.spans["meters"] = (a - steps.t0, time.perf_counter() - steps.t0)
                out["analysis"] = now["analysis"]

            if columns is None:
                _together(design_then_spectra, picture, meters)
            else:
                _together(design, spectra, picture, meters)
            out.update(ready_s=max(end for _, end in steps.spans.values()),
                       cpu_s=time.process_time() - c0, steps=steps.spans,
                       analysed_in_upload=rec["analysis"] == "done")
        finally:
            app.extensions["rateferry"].shutdown()
    return out


def _upload(app, headers, path, columns, spectra=None):
    data = {"file": (open(path, "rb"), os.path.basename(path))}
    if columns is not None:
        data["columns"] = str(columns)
    if spectra is not None:
        data["spectra"] = spectra
    r = app.test_client().post("/api/recordings", headers=headers, data=data,
                               content_type="multipart/form-data")
    return _ok(r, 201)


def _ok(r, status=200):
    if r.status_code != status:
        raise RuntimeError(f"{r.request.path} answered {r.status_code}: {r.data[:300]!r}")
    return r.get_json()


def _together(*fns):
    errors = []

    def guard(fn):
        try:
            fn()
        except BaseException as exc:    # handed to the caller
            errors.append(exc)
    threads = [threading.Thread(target=guard, args=(fn,)) for fn in fns]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    if errors:
        raise errors[0]


def parts(path):
    """The parts of the one read alone, one after the other on one thread (one BLAS thread),
    and the two separate reads of before."""
    info, w, c = timed(lambda: media.probe(path))
    out = dict(probe=dict(wall_s=w, cpu_s=c))
    _, w, c = timed(lambda: [None for _ in media.read_blocks(path, blocksize=_BLOCK)])
    out["read"] = dict(wall_s=w, cpu_s=c)
    # kept in memory, so the meters below time their own work only
    blocks = list(media.read_blocks(path, blocksize=_BLOCK))

    def meters():
        meter = Meters(info.rate_hz, info.channels)
        for b in blocks:
            meter.process(b, checked=True)
        return meter.result()

    def columns():
        from webapp.overview import _Columns
        grid = _Columns(COLUMNS, info.frames)
        for b in blocks:
            grid.add(b)
        return grid

    with threadpool_limits(limits=1, user_api="blas"):
        figures, w, c = timed(meters)
        out["meters"] = dict(wall_s=w, cpu_s=c)
        grid, w, c = timed(columns)
        out["columns"] = dict(wall_s=w, cpu_s=c)
        # the one read searches from where the meter's running true peak goes over 0 dBTP
        start = _search_from(blocks, info) if (figures["true_peak_dbtp"] or -1.0) > 0.0 \
            else None
        if start is not None:
            found, w, c = timed(lambda: _search(blocks, info, start))
            out["overs"] = dict(wall_s=w, cpu_s=c, frames=int(found.size))
        else:
            out["overs"] = dict(wall_s=0.0, cpu_s=0.0, frames=0)
        blocks.clear()
        _, w, c = timed(lambda: measure_file(path, info.rate_hz, info.channels))
        out["before_meters"] = dict(wall_s=w, cpu_s=c)
    _, w, c = timed(lambda: overview(path, columns=COLUMNS, probe=info))
    out["before_overview"] = dict(wall_s=w, cpu_s=c)
    return out


def _search_from(blocks, info):
    """The first frame the one read searches for overs (as its true-peak stage decides)."""
    from webapp.dsp.truepeak import TruePeakMeter
    from webapp.overview import _search_start
    meter = TruePeakMeter(rate_hz=info.rate_hz, channels=info.channels)
    for b in blocks:
        measured, _ = meter.running()
        meter.process(b, checked=True)
        if meter.running()[1] > 1.0 - 1e-4:      # as the one read's true-peak stage
            return _search_start(measured)
    return _search_start(meter.running()[0])


def _search(blocks, info, start):
    """The search for overs alone, from frame ``start`` (the blocks are the whole file)."""
    from webapp.dsp.overs import TruePeakOvers
    finder = TruePeakOvers(channels=info.channels)
    found, at = [], 0
    for b in blocks:
        if at + b.shape[0] > start:
            found.append(finder.process(b[max(start - at, 0):]))
        at += b.shape[0]
    return np.concatenate(found + [finder.finish()])


# Choosing the file is done by Playwright; this waits until the page shows the new recording's
# figures (meters in), its overview and its spectra with the design's filter gain, and a frame
# is painted. On the way it notes where the time goes: the upload's body sent (the XHR's
# upload "load"), each request after it as the browser saw it (Resource Timing: asked ->
# answered), and each plot drawn (Plotly.react, wrapped here for the benchmark only).
PAGE_READY = """async (name) => new Promise((resolve) => {
  const t0 = performance.now();
  const marks = {};
  const draws = [];
  const P = window.Plotly;
  const react = P.react;
  P.react = function (el, ...rest) {
    const a = performance.now();
    const out = react.call(this, el, ...rest);
    draws.push({ plot: el.id, start: (a - t0) / 1000, end: (performance.now() - t0) / 1000 });
    return out;
  };
  const send = XMLHttpRequest.prototype.send;
  XMLHttpRequest.prototype.send = function (...args) {
    this.upload.addEventListener('load', () => { marks.sent = marks.sent || performance.now() - t0; });
    return send.apply(this, args);
  };
  const done = () => {
    P.react = react;
    XMLHttpRequest.prototype.send = send;
    const requests = performance.getEntriesByType('resource')
      .filter((e) => e.startTime >= t0 && /\\/api\\//.test(e.name))
      .map((e) => ({ url: new URL(e.name).pathname, kind: e.initiatorType,
                     start: (e.startTime - t0) / 1000, end: (e.responseEnd - t0) / 1000,
                     bytes: e.encodedBodySize }));
    const s = {};
    for (const [k, v] of Object.entries(marks)) s[k] = v / 1000;
    resolve({ ...s, ready: (performance.now() - t0) / 1000, requests, draws });
  };
  const check = () => {
    const s = window.rateferry.state.get();
    const rec = s.recording;
    const mine = rec && rec.name === name;
    const now = performance.now() - t0;
    if (mine && !marks.loaded) marks.loaded = now;
    if (mine && rec.analysis === 'done' && !marks.figures) marks.figures = now;
    const ov = document.getElementById('overview-view');
    if (mine && ov.dataset.recording === rec.id && document.getElementById('plot-overview').data
        && !marks.overview) marks.overview = now;
    const gd = document.getElementById('plot-spectra');
    const d = s.design;
    if (mine && s.spectra && s.spectra.recording_id === rec.id && gd.data && !marks.spectra) {
      marks.spectra = now;
    }
    if (marks.spectra && d && d.fs_in === rec.rate_hz && d.id === s.spectra.design_id
        && gd.data.some((t) => t.meta === 'filter_gain') && !marks.gain) marks.gain = now;
    if (marks.figures && marks.overview && marks.spectra && marks.gain) {
      requestAnimationFrame(done);
    } else {
      setTimeout(check, 5);
    }
  };
  check();
})"""


def _cpu_snapshot():
    """CPU seconds used so far by every process (pid -> (parent pid, seconds))."""
    tick = os.sysconf("SC_CLK_TCK")
    out = {}
    for pid in os.listdir("/proc"):
        if not pid.isdigit():
            continue
        try:
            with open(f"/proc/{pid}/stat") as f:
                stat = f.read()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2:].split()
        out[int(pid)] = (int(fields[1]), (int(fields[11]) + int(fields[12])) / tick)
    return out


def _cpu_between(before, after):
    """CPU seconds between two snapshots used by this process (the server), its descendants
    (the browser) and every other process on the machine (another user's work slows the page
    as much as its own); processes that ended meanwhile are not counted."""
    me = os.getpid()
    mine = {me}
    grew = True
    while grew:
        more = {p for p, (pp, _) in after.items() if pp in mine and p not in mine}
        mine |= more
        grew = bool(more)
    used = {p: after[p][1] - before.get(p, (None, 0.0))[1] for p in after}
    return dict(server=used.get(me, 0.0),
                browser=sum(v for p, v in used.items() if p in mine and p != me),
                others=sum(v for p, v in used.items() if p not in mine and v > 0))


def page_times(path, runs=1):
    """Seconds from choosing ``path`` in the page to each part shown, one dict per run (the
    page loaded afresh each time, the same server), or None without chromium."""
    if not browser.available():
        return None
    out = []
    with browser.ready_page(timeout_ms=900000) as page:
        for run in range(runs):
            if run:
                page.reload()
                page.wait_for_selector("body[data-ready='true']")
            page.wait_for_function("() => document.getElementById('plot-spectra').data")
            page.wait_for_timeout(1500)       # the demo's own work settles
            # a name of its own each time (the page reopens on the last recording)
            stem, ext = os.path.splitext(path)
            chosen = f"{stem}-{run + 1}{ext}"
            if not os.path.exists(chosen):
                os.link(path, chosen)
            # the watch starts before the file is chosen (a promise kept in the page)
            page.evaluate(f"(name) => {{ window.__benchReady = ({PAGE_READY})(name); }}",
                          os.path.basename(chosen))
            c0 = _cpu_snapshot()
            page.set_input_files("#file-input", chosen)
            marks = page.evaluate("() => window.__benchReady")
            marks["cpu"] = _cpu_between(c0, _cpu_snapshot())
            out.append(marks)
    return out


def _page_rows(runs, ref_w, target):
    """The page's figures: every run's total, then where the time went in the median run."""
    totals = sorted(r["ready"] for r in runs)
    rows = []
    for i, r in enumerate(runs):
        rows.append(dict(name=f"page: chosen -> all shown (run {i + 1})", value=r["ready"],
                         unit="s", reference="reading the file once", reference_value=ref_w,
                         **({"target": target} if target else {})))
        cpu = r["cpu"]
        rows.append(dict(name=f"  run {i + 1}: upload's body sent {r.get('sent', 0):.3f} s, "
                              f"answered {r['loaded']:.3f} s; after it, all shown in",
                         value=r["ready"] - r["loaded"], unit="s"))
        rows.append(dict(name=f"  run {i + 1}: CPU, server's process {cpu['server']:.2f} s, "
                              f"browser {cpu['browser']:.2f} s, other processes",
                         value=cpu["others"], unit="s"))
    if len(runs) > 1:
        rows.append(dict(name=f"page: chosen -> all shown, {len(runs)} runs: "
                              f"{totals[0]:.3f} to {totals[-1]:.3f} s, median",
                         value=totals[len(totals) // 2], unit="s"))
    median = sorted(runs, key=lambda r: r["ready"])[len(runs) // 2]
    rows.append(dict(name="  where the time went (the median run):", value=""))
    for key, label in (("sent", "upload's body sent"), ("loaded", "recording in the page"),
                       ("figures", "its meters shown"), ("overview", "overview drawn"),
                       ("spectra", "spectra drawn"), ("gain", "spectra with the filter gain")):
        if key in median:
            rows.append(dict(name=f"  page: {label}", value=median[key], unit="s"))
    for q in median["requests"]:
        rows.append(dict(name=f"  request {q['url']}: {q['start']:.3f} -> {q['end']:.3f} s "
                              f"({q['bytes']} bytes)", value=q["end"] - q["start"], unit="s"))
    for d in median["draws"]:
        rows.append(dict(name=f"  drawn {d['plot']}: {d['start']:.3f} -> {d['end']:.3f} s",
                         value=d["end"] - d["start"], unit="s"))
    return rows


def _sequence_rows(label, seq, ref, target):
    rows = [dict(name=f"{label}: all ready, wall", value=seq["ready_s"], unit="s",
                 reference=ref[0], reference_value=ref[1], **({"target": target} if target
                                                               else {})),
            dict(name=f"{label}: CPU (every thread)", value=seq["cpu_s"], unit="s",
                 reference=ref[0], reference_value=ref[2])]
    for step in ("upload", "design", "spectra", "overview", "meters"):
        if step in seq["steps"]:
            a, b = seq["steps"][step]
            rows.append(dict(name=f"  {step}: {a:.3f} -> {b:.3f} s", value=b - a, unit="s"))
    if seq.get("overview_seconds") is not None:
        rows.append(dict(name="  the read that drew the overview", value=seq["overview_seconds"],
                         unit="s"))
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python benchmarks/bench_recording.py",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=3.0, help="recording length, default 3")
    ap.add_argument("--format", choices=("wav", "flac"), default="wav",
                    help="24-bit WAV (default) or 16-bit FLAC")
    ap.add_argument("--parts", action=argparse.BooleanOptionalAction, default=None,
                    help="time the parts alone (default: for files up to 10 minutes)")
    ap.add_argument("--separate", action=argparse.BooleanOptionalAction, default=None,
                    help="also the sequence of before: meters and overview in two reads "
                         "(default: for files up to 10 minutes)")
    ap.add_argument("--gain-db", type=float, default=0.0,
                    help="level of the programme against the default (about +0.01 dBTP, a few "
                         "overs); e.g. -6 for a programme with none")
    ap.add_argument("--page", action="store_true",
                    help="also load the file in the page (chromium through Playwright)")
    ap.add_argument("--page-runs", type=int, default=1,
                    help="with --page: load the file this many times (the page afresh each "
                         "time), default 1")
    ap.add_argument("--tmp", default=None, help="folder for the temporary file")
    args = ap.parse_args(argv)
    short = args.minutes <= 10
    with tempfile.TemporaryDirectory(dir=args.tmp) as tmp:
        path = os.path.join(tmp, f"programme.{args.format}")
        make_source(path, args.minutes, args.format, gain_db=args.gain_db)
        size_mb = os.path.getsize(path) / 1e6
        _, read_w, read_c = timed(lambda: [None for _ in media.read_blocks(path,
                                                                           blocksize=_BLOCK)])
        seq = page_sequence(path, columns=COLUMNS)
        before = page_sequence(path, columns=None) \
            if (args.separate if args.separate is not None else short) else None
        alone = parts(path) if (args.parts if args.parts is not None else short) else None
        page = page_times(path, args.page_runs) if args.page else None
    target = "< 1 s" if args.minutes <= 3 else ("< 8 s" if args.minutes >= 60 else None)
    ref = ("reading the file once", read_w, read_c)
    rows = _sequence_rows("one read", seq, ref, target)
    if before is not None:
        rows += _sequence_rows("before (two reads)", before, ref, target)
    if alone is not None:
        for key, label in (("probe", "probe"), ("read", "read the file (soundfile)"),
                           ("meters", "meters (loudness, true peak)"),
                           ("columns", "overview columns (min, max, full scale)"),
                           ("overs", "overs: searched from where the true peak goes over"),
                           ("before_meters", "before: meters alone (measure_file)"),
                           ("before_overview", "before: overview alone (its own read)")):
            rows.append(dict(name=f"  alone, CPU: {label}", value=alone[key]["cpu_s"],
                             unit="s", reference=ref[0], reference_value=read_c))
    if args.page:
        if page is None:
            rows.append(dict(name="page: chosen -> all shown", value="skipped (no chromium)"))
        else:
            rows += _page_rows(page, read_w, target)
    title = (f"{args.minutes:g} min stereo {RATE_HZ} Hz "
             f"{'24-bit WAV' if args.format == 'wav' else '16-bit FLAC'} ({size_mb:.1f} MB) "
             f"{f'{args.gain_db:+g} dB ' if args.gain_db else ''}loaded in the page, overview "
             f"{COLUMNS} columns")
    return dict(title=title, figures=rows, sequence=seq, before=before, alone=alone, page=page,
                load_average=list(os.getloadavg()))


if __name__ == "__main__":
    from run import print_result   # noqa: E402 (benchmarks/run.py beside this file)
    res = main(sys.argv[1:])
    print_result("recording", res)
    print("load average (1, 5, 15 min): " + ", ".join(f"{v:.2f}" for v in res["load_average"]))
