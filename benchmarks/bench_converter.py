"""The exact polyphase converter against scipy.signal.upfirdn with the same taps, in one run.

    python benchmarks/bench_converter.py                  # table, 30 s stereo per route
    python benchmarks/bench_converter.py --seconds 10 --repeats 9
    python benchmarks/bench_converter.py --json

Each route is timed streaming (blocks of 65536 frames, as the file pipeline feeds it) and
scipy.signal.upfirdn on the whole signal; they are timed in turn, repeat by repeat, and the
best of each is kept, so a busy moment on a shared machine hits both alike; the CPU-time
ratio is printed too, steadier when other work shares the cores. CPU seconds are the calling
thread's for the one-thread runs and scipy, and the whole process's with BLAS threads (which
then include its helper threads' waiting, as OpenBLAS threads spin for a while after a call,
and are coarse on some kernels: treat that one as a rough figure).

Two settings of the BLAS library, both in the same run: its default threads (every core; or
``--blas-threads N``), and one thread, which is how the file pipeline runs the converter
(it holds BLAS to one thread and spends the other cores on decoding, meters and encoding).
scipy.signal.upfirdn runs on one thread in both. Figures only; nothing asserts.
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


def _blas_limit(threads):
    from threadpoolctl import threadpool_limits
    return threadpool_limits(limits=threads or None, user_api="blas")


def _blas_threads():
    from threadpoolctl import threadpool_info
    return max((p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"),
               default=1)


def _timed(fn, clock):
    t0, c0 = time.perf_counter(), clock()
    fn()
    return time.perf_counter() - t0, clock() - c0


def bench_route(fs_in, fs_out, *, seconds, arithmetic, repeats=5, attenuation_db=120.0,
                blas_threads=0):
    """One route: ours with ``blas_threads`` (0: the library's default) and with one BLAS
    thread, scipy.signal.upfirdn beside both; best wall and CPU seconds of each."""
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

    settings = {"main": blas_threads, "one": 1}
    clocks = {"main": time.process_time, "one": time.thread_time, "ref": time.thread_time}
    best = {k: [float("inf"), float("inf")] for k in ("main", "one", "ref")}
    with _blas_limit(blas_threads):
        threads = _blas_threads()
        ours()                              # first call: caches and BLAS buffers
    for _ in range(repeats):
        for key, fn in (("main", ours), ("one", ours), ("ref", reference)):
            with _blas_limit(settings.get(key, 1)):
                wall, cpu = _timed(fn, clocks[key])
            best[key] = [min(best[key][0], wall), min(best[key][1], cpu)]
    (t_ours, c_ours), (t_one, c_one), (t_ref, c_ref) = best["main"], best["one"], best["ref"]
    out_frames = fs_out * seconds
    layout = getattr(conv, "_layout", None)
    return dict(
        route=f"{fs_in}->{fs_out}", up=d.up, down=d.down, arithmetic=arithmetic,
        numtaps=d.numtaps, taps_per_phase=d.taps_per_phase, method=d.method,
        seconds_audio=seconds, channels=2, blas_threads=threads,
        rateferry_s=t_ours, scipy_upfirdn_s=t_ref, speedup_vs_scipy=t_ref / t_ours,
        # CPU seconds: steadier than wall time on a shared machine
        rateferry_cpu_s=c_ours, scipy_upfirdn_cpu_s=c_ref, cpu_ratio=c_ref / max(c_ours, 1e-9),
        # one BLAS thread, as the file pipeline runs it
        rateferry_1thread_s=t_one, rateferry_1thread_cpu_s=c_one,
        speedup_1thread=t_ref / t_one, cpu_ratio_1thread=c_ref / max(c_one, 1e-9),
        target_speedup=TARGETS[arithmetic], x_realtime=seconds / t_ours,
        mmac_per_s=d.taps_per_phase * out_frames * 2 / t_ours / 1e6,
        layout=None if layout is None else dict(
            blocks=layout.blocks, stride=layout.stride,
            groups=[[int(s.groups), s.size, s.width] for s in layout.stacks],
            macs_per_output=round(layout.macs_per_output, 1),
            tile_rows=getattr(layout, "tile_rows", None)),
    )


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python benchmarks/bench_converter.py",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=30.0, help="signal length, default 30 s stereo")
    ap.add_argument("--arithmetic", choices=["float32", "float64", "both"], default="both")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--blas-threads", type=int, default=0,
                    help="BLAS threads of the main figures (0: the library's default); one "
                         "thread is always measured beside them")
    ap.add_argument("--json", action="store_true", help="print the result as JSON")
    args = ap.parse_args(argv)
    kinds = ["float32", "float64"] if args.arithmetic == "both" else [args.arithmetic]
    rows = [bench_route(a, b, seconds=args.seconds, arithmetic=k, repeats=args.repeats,
                        blas_threads=args.blas_threads)
            for a, b in ROUTES for k in kinds]
    threads = rows[0]["blas_threads"]
    figures = []
    for r in rows:
        for label, key in ((f"BLAS {threads} threads", "rateferry_s"),
                           ("BLAS 1 thread", "rateferry_1thread_s")):
            figures.append(dict(
                name=f"{r['route']} {r['arithmetic']} {label}", value=r[key], unit="s",
                reference="scipy.signal.upfirdn", reference_value=r["scipy_upfirdn_s"],
                ratio=round(r["scipy_upfirdn_s"] / r[key], 1),
                target=f">= {r['target_speedup']:g}x"))
    return dict(title=f"converter vs scipy.signal.upfirdn, same taps, {args.seconds:g} s stereo, "
                      f"120 dB mask, BLAS {threads} threads and 1 thread",
                figures=figures, routes=rows, block_frames=BLOCK,
                load_average=list(os.getloadavg()))


def print_table(result):
    print(result["title"])
    n = result["routes"][0]["blas_threads"]
    print(f"{'':>38} {f'BLAS {n} threads':-^30} {'BLAS 1 thread':-^30}")
    print(f"{'route':>14} {'arith':>8} {'T':>4} {'scipy s':>8} "
          + f"{'ours s':>8} {'speedup':>8} {'CPU ratio':>9} {'':>2}" * 2 + f"{'target':>7}")
    for r in result["routes"]:
        print(f"{r['route']:>14} {r['arithmetic']:>8} {r['taps_per_phase']:>4} "
              f"{r['scipy_upfirdn_s']:8.4f} "
              f"{r['rateferry_s']:8.4f} {r['speedup_vs_scipy']:7.1f}x {r['cpu_ratio']:8.1f}x   "
              f"{r['rateferry_1thread_s']:8.4f} {r['speedup_1thread']:7.1f}x "
              f"{r['cpu_ratio_1thread']:8.1f}x {'':>2}{r['target_speedup']:6.0f}x")
    print("load average (1, 5, 15 min): " + ", ".join(f"{v:.2f}" for v in result["load_average"]))


if __name__ == "__main__":
    res = main(sys.argv[1:])
    if "--json" in sys.argv[1:]:
        print(json.dumps(res, indent=2))
    else:
        print_table(res)
