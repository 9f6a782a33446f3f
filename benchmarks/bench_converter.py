"""The exact polyphase converter against scipy.signal.upfirdn with the same taps, in one run.

    python benchmarks/bench_converter.py                  # table, 30 s stereo per route
    python benchmarks/bench_converter.py --seconds 10 --repeats 9
    python benchmarks/bench_converter.py --json

Each route is timed streaming (blocks of 65536 frames, as the file pipeline feeds it) and
scipy.signal.upfirdn on the whole signal; the two are timed in turn, repeat by repeat, and the
best of each is kept, so a busy moment on a shared machine hits both alike; the CPU-time
ratio (all threads' CPU seconds) is printed too, steadier when other work shares the cores. The BLAS library
runs with its default threads (``--blas-threads 1`` for one). Figures only; nothing asserts.
"""

import argparse
import json
import os
import sys
import time
from dataclasses import replace

import numpy as np
from scipy import signal

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from webapp.dsp.design import design  # noqa: E402
from webapp.dsp.polyphase import make_converter  # noqa: E402
from webapp.dsp.spec import preset  # noqa: E402

ROUTES = [(44100, 48000), (48000, 44100), (48000, 16000), (24000, 96000), (44100, 22050)]
BLOCK = 65536
TARGETS = {"float32": 20.0, "float64": 12.0}   # x scipy.signal.upfirdn (issue "Speed")


def bench_route(fs_in, fs_out, *, seconds, arithmetic, repeats=5, attenuation_db=120.0):
    spec = replace(preset("music_delivery"), attenuation_db=attenuation_db, arithmetic=arithmetic)
    d = design(spec, fs_in, fs_out)
    rng = np.random.default_rng(0)
    x = (0.25 * rng.standard_normal((int(fs_in * seconds), 2))).astype(arithmetic)
    taps = d.taps.astype(arithmetic)
    conv = make_converter(d, channels=2)

    def ours():
        conv.reset()
        for i in range(0, x.shape[0], BLOCK):
            conv.process(x[i:i + BLOCK])
        conv.flush()

    def reference():
        signal.upfirdn(taps, x, d.up, d.down, axis=0)

    ours()                                  # first call: caches and BLAS buffers
    t_ours = t_ref = c_ours = c_ref = float("inf")
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        ours()
        t_ours, c_ours = min(t_ours, time.perf_counter() - t0), min(c_ours, time.process_time() - c0)
        t0, c0 = time.perf_counter(), time.process_time()
        reference()
        t_ref, c_ref = min(t_ref, time.perf_counter() - t0), min(c_ref, time.process_time() - c0)
    out_frames = fs_out * seconds
    layout = getattr(conv, "_layout", None)
    return dict(
        route=f"{fs_in}->{fs_out}", up=d.up, down=d.down, arithmetic=arithmetic,
        numtaps=d.numtaps, taps_per_phase=d.taps_per_phase, method=d.method,
        seconds_audio=seconds, channels=2,
        rateferry_s=t_ours, scipy_upfirdn_s=t_ref, speedup_vs_scipy=t_ref / t_ours,
        # CPU seconds (all threads): steadier than wall time on a shared machine
        rateferry_cpu_s=c_ours, scipy_upfirdn_cpu_s=c_ref, cpu_ratio=c_ref / max(c_ours, 1e-9),
        target_speedup=TARGETS[arithmetic], x_realtime=seconds / t_ours,
        mmac_per_s=d.taps_per_phase * out_frames * 2 / t_ours / 1e6,
        layout=None if layout is None else dict(
            blocks=layout.blocks, stride=layout.stride,
            groups=[[s.groups, s.size, s.width] for s in layout.stacks],
            macs_per_output=round(layout.macs_per_output, 1)),
    )


def _blas_limit(threads):
    if not threads:
        return None
    from threadpoolctl import threadpool_limits
    return threadpool_limits(limits=threads, user_api="blas")


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python benchmarks/bench_converter.py",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=30.0, help="signal length, default 30 s stereo")
    ap.add_argument("--arithmetic", choices=["float32", "float64", "both"], default="both")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--blas-threads", type=int, default=0, help="limit BLAS threads (0: default)")
    ap.add_argument("--json", action="store_true", help="print the result as JSON")
    args = ap.parse_args(argv)
    kinds = ["float32", "float64"] if args.arithmetic == "both" else [args.arithmetic]
    limit = _blas_limit(args.blas_threads)
    try:
        rows = [bench_route(a, b, seconds=args.seconds, arithmetic=k, repeats=args.repeats)
                for a, b in ROUTES for k in kinds]
    finally:
        if limit is not None:
            limit.restore_original_limits()
    figures = [dict(name=f"{r['route']} {r['arithmetic']}", value=r["rateferry_s"], unit="s",
                    reference="scipy.signal.upfirdn", reference_value=r["scipy_upfirdn_s"],
                    ratio=round(r["speedup_vs_scipy"], 1), target=f">= {r['target_speedup']:g}x")
               for r in rows]
    return dict(title=f"converter vs scipy.signal.upfirdn, same taps, {args.seconds:g} s stereo, "
                      f"120 dB mask, BLAS threads {args.blas_threads or 'default'}",
                figures=figures, routes=rows, block_frames=BLOCK,
                load_average=list(os.getloadavg()))


def print_table(result):
    print(result["title"])
    print(f"{'route':>14} {'arith':>8} {'taps':>6} {'T':>4} {'ours s':>8} {'scipy s':>8} "
          f"{'speedup':>8} {'target':>7} {'x real':>8} {'MMAC/s':>8} {'CPU ratio':>9}")
    for r in result["routes"]:
        print(f"{r['route']:>14} {r['arithmetic']:>8} {r['numtaps']:>6} {r['taps_per_phase']:>4} "
              f"{r['rateferry_s']:8.4f} {r['scipy_upfirdn_s']:8.4f} {r['speedup_vs_scipy']:7.1f}x "
              f"{r['target_speedup']:6.0f}x {r['x_realtime']:8.0f} {r['mmac_per_s']:8.0f} "
              f"{r['cpu_ratio']:8.1f}x")
    print("load average (1, 5, 15 min): " + ", ".join(f"{v:.2f}" for v in result["load_average"]))


if __name__ == "__main__":
    res = main(sys.argv[1:])
    if "--json" in sys.argv[1:]:
        print(json.dumps(res, indent=2))
    else:
        print_table(res)
