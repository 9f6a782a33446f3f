"""Live redesign: a new design at the API and in the page, beside scipy's Kaiser design.

Run: ``python benchmarks/bench_design.py [--runs 7] [--page]`` (the runner,
``python -m benchmarks``, takes its figures from ``main()``).

Rows (median of ``--runs``; each run a spec never seen before, so nothing comes from a cache;
wall and CPU time of this process, which holds the server):

* POST /api/designs with ``plans: false`` for 44.1 -> 48 kHz at 120 dB (the page's live
  redesign): the design grown until it meets the mask, measured, and its plot data as JSON;
* the core alone: ``webapp.dsp.design.design`` and ``webapp.figures.design_view``;
* the reference: ``scipy.signal.kaiserord`` + ``scipy.signal.firwin`` for the same edges and
  attenuation (a window design from the formula, never measured nor plotted);
* with ``--page``: the time from an edit of the stopband rejection in the page (Debian's
  chromium through Playwright, the real server on a loopback port) to the four filter plots
  drawn for the new design. Where it goes (quiet machine): 40 ms pause after the edit (the
  order estimate is asked for during it), about 40 ms for the design at the server, about 60 ms
  for plotly to draw the four plots, a frame to paint.

Figures only; nothing here asserts a time.
"""

import argparse
import os
import statistics
import sys
import tempfile
import time

from scipy import signal

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from benchmarks import browser  # noqa: E402
from webapp.dsp.design import design  # noqa: E402
from webapp.dsp.rates import route  # noqa: E402
from webapp.dsp.spec import Spec  # noqa: E402
from webapp.figures import design_view  # noqa: E402
from webapp.jsontools import jsonable  # noqa: E402

FS_IN, FS_OUT = 44100, 48000
ATTENUATION_DB = 120.0


def timed(fn):
    """(result, wall s, CPU s of this process)."""
    c0, t0 = time.process_time(), time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0, time.process_time() - c0


def _attenuation(i):
    # a fresh spec each run (nothing cached) that is still the 120 dB design in practice
    return ATTENUATION_DB + 0.001 * (i + 1)


def api_times(runs):
    from webapp.server import create_app
    with tempfile.TemporaryDirectory() as inst:
        app = create_app({"TESTING": True, "LOAD_DEMO": False, "INSTANCE_PATH": inst})
        client = app.test_client()
        headers = {"X-Rateferry-Token": app.config["PAGE_TOKEN"]}
        walls, cpus = [], []
        try:
            for i in range(runs + 1):
                body = {"fs_in": FS_IN, "fs_out": FS_OUT, "plans": False,
                        "spec": {"attenuation_db": _attenuation(i)}}
                r, wall, cpu = timed(lambda: client.post("/api/designs", json=body,
                                                         headers=headers))
                if r.status_code != 200 or r.get_json()["timing"]["cached"]:
                    raise RuntimeError(f"unexpected answer {r.status_code}: {r.data[:200]!r}")
                if i:   # the first request also warms up imports and the store
                    walls.append(wall)
                    cpus.append(cpu)
                # the plans start after the response; let them finish outside the timing
                app.extensions["rateferry"].cache.plans(Spec(attenuation_db=_attenuation(i)),
                                                        FS_IN, FS_OUT)
        finally:
            app.extensions["rateferry"].shutdown()
    return statistics.median(walls), statistics.median(cpus)


def core_times(runs):
    d_w, d_c, v_w, v_c = [], [], [], []
    for i in range(runs):
        d, w, c = timed(lambda: design(Spec(attenuation_db=_attenuation(100 + i)), FS_IN, FS_OUT))
        d_w.append(w)
        d_c.append(c)
        _, w, c = timed(lambda: jsonable(design_view(d)))
        v_w.append(w)
        v_c.append(c)
    med = statistics.median
    return dict(design_wall_s=med(d_w), design_cpu_s=med(d_c), view_wall_s=med(v_w),
                view_cpu_s=med(v_c), numtaps=d.numtaps, iterations=d.iterations,
                attenuation_db=d.measured.stopband_attenuation_db)


def scipy_times(runs):
    mask = Spec().mask(route(FS_IN, FS_OUT))
    rate = float(FS_IN * mask.up)
    width = (mask.stopband_hz - mask.passband_hz) / (rate / 2)
    walls, cpus = [], []
    for _ in range(runs):
        def kaiser():
            numtaps, beta = signal.kaiserord(ATTENUATION_DB, width)
            numtaps |= 1
            return signal.firwin(numtaps, 0.5 * (mask.passband_hz + mask.stopband_hz),
                                 window=("kaiser", beta), fs=rate)
        h, w, c = timed(kaiser)
        walls.append(w)
        cpus.append(c)
    return statistics.median(walls), statistics.median(cpus), int(h.size)


def page_times(runs):
    """Edit -> plots drawn in the real page, in ms (median), or None without chromium."""
    if not browser.available():
        return None
    times = []
    with browser.ready_page(timeout_ms=60000) as page:
        page.click("#tab-filter")
        page.wait_for_function("() => { const p = document.getElementById("
                               "'plot-magnitude'); return p && p.data; }")
        for i in range(runs + 1):
            value = ATTENUATION_DB + 0.5 * (i + 1)
            ms = page.evaluate(EDIT_TO_PLOT, value)
            if i:
                times.append(ms)
            page.wait_for_timeout(1500)   # the plans follow; let them settle
    return statistics.median(times)


# One edit of the rejection field, then the time until the four filter plots show the design
# with the new mask (each drawn again since the edit) and the browser has painted a frame.
EDIT_TO_PLOT = """async (value) => {
  const input = document.getElementById('spec-attenuation-db');
  const plots = ['plot-magnitude', 'plot-passband', 'plot-impulse', 'plot-group-delay']
    .map((id) => document.getElementById(id));
  const before = plots.map((p) => p.data);
  const mag = plots[0];
  return await new Promise((resolve) => {
    const t0 = performance.now();
    input.value = String(value);
    input.dispatchEvent(new Event('input', { bubbles: true }));
    const check = () => {
      const d = window.rateferry.state.get('design');
      const drawn = mag.data && mag.data.some((t) => (t.y || []).includes(-value))
        && plots.every((p, i) => p.data && p.data !== before[i]);
      if (d && d.mask.attenuation_db === value && drawn) {
        requestAnimationFrame(() => resolve(performance.now() - t0));
      } else {
        requestAnimationFrame(check);
      }
    };
    check();
  });
}"""


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python benchmarks/bench_design.py",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=7, help="runs per figure (median), default 7")
    ap.add_argument("--page", action="store_true",
                    help="also time edit -> plots in the page (chromium through Playwright)")
    args = ap.parse_args(argv)
    runs = max(1, args.runs)
    api_wall, api_cpu = api_times(runs)
    core = core_times(runs)
    ref_wall, ref_cpu, ref_taps = scipy_times(runs)
    ms = 1000.0
    ref = "scipy kaiserord + firwin"
    rows = [
        dict(name="API new design, wall", value=api_wall * ms, unit="ms", reference=ref,
             reference_value=ref_wall * ms, target="< 150 ms"),
        dict(name="API new design, CPU", value=api_cpu * ms, unit="ms", reference=ref,
             reference_value=ref_cpu * ms),
        dict(name="design() CPU", value=core["design_cpu_s"] * ms, unit="ms", reference=ref,
             reference_value=ref_cpu * ms),
        dict(name="design_view() + JSON CPU", value=core["view_cpu_s"] * ms, unit="ms"),
        dict(name="numtaps (grown, measured)", value=core["numtaps"], unit="taps",
             reference="kaiserord's estimate", reference_value=ref_taps),
    ]
    if args.page:
        page_ms = page_times(runs)
        rows.append(dict(name="page: edit -> plots drawn", value=page_ms, unit="ms",
                         target="< 250 ms") if page_ms is not None else
                    dict(name="page: edit -> plots drawn", value="skipped (no chromium)",
                         unit=""))
    title = (f"live redesign {FS_IN} -> {FS_OUT} Hz, {ATTENUATION_DB:g} dB, uncached "
             f"(median of {runs})")
    return dict(title=title, figures=rows, core=core, load_average=list(os.getloadavg()))


if __name__ == "__main__":
    from run import print_result   # noqa: E402 (benchmarks/run.py beside this file)
    res = main(sys.argv[1:])
    print_result("design", res)
    print("load average (1, 5, 15 min): " + ", ".join(f"{v:.2f}" for v in res["load_average"]))
