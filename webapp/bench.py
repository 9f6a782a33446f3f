"""Benchmarks: Rateferry's converter and pipeline side by side with scipy.signal, in one run.

    python -m webapp.bench                 # table
    python -m webapp.bench --json          # one JSON object with a "routes" list
    python -m webapp.bench --seconds 20    # shorter signals
    python -m webapp.bench --pipeline      # also the whole file pipeline (see bench_pipeline)

Figures only; nothing here asserts a time.
"""

import argparse
import json
import sys
import time
from dataclasses import replace

import numpy as np
from scipy import signal

from .dsp.design import design
from .dsp.polyphase import make_converter
from .dsp.spec import preset

ROUTES = [(44100, 48000), (48000, 44100), (48000, 16000), (24000, 96000), (44100, 22050)]
BLOCK = 65536


def _best_of(fn, repeats):
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def bench_route(fs_in, fs_out, *, seconds, arithmetic, repeats=2, attenuation_db=120.0):
    spec = replace(preset("music_delivery"), attenuation_db=attenuation_db, arithmetic=arithmetic)
    d = design(spec, fs_in, fs_out)
    rng = np.random.default_rng(0)
    x = (0.25 * rng.standard_normal((fs_in * seconds, 2))).astype(arithmetic)
    taps = d.taps.astype(arithmetic)

    def ours():
        conv = make_converter(d, channels=2)
        for i in range(0, x.shape[0], BLOCK):
            conv.process(x[i:i + BLOCK])
        conv.flush()

    def reference():
        signal.upfirdn(taps, x, d.up, d.down, axis=0)

    t_ours = _best_of(ours, repeats)
    t_ref = _best_of(reference, repeats)
    out_frames = fs_out * seconds
    return dict(
        route=f"{fs_in}->{fs_out}", up=d.up, down=d.down, arithmetic=arithmetic,
        numtaps=d.numtaps, taps_per_phase=d.taps_per_phase, method=d.method,
        seconds_audio=seconds, channels=2,
        rateferry_s=t_ours, scipy_upfirdn_s=t_ref, speedup_vs_scipy=t_ref / t_ours,
        x_realtime=seconds / t_ours,
        mmac_per_s=d.taps_per_phase * out_frames * 2 / t_ours / 1e6,
    )


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python -m webapp.bench", description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=int, default=60, help="signal length, default 60 s stereo")
    ap.add_argument("--arithmetic", choices=["float32", "float64", "both"], default="both")
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--pipeline", action="store_true", help="also bench the whole file pipeline")
    ap.add_argument("--pipeline-minutes", type=float, default=10.0)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    kinds = ["float32", "float64"] if args.arithmetic == "both" else [args.arithmetic]
    rows = [bench_route(a, b, seconds=args.seconds, arithmetic=k, repeats=args.repeats)
            for a, b in ROUTES for k in kinds]
    result = {"routes": rows, "mask": "music_delivery preset at 120 dB", "block_frames": BLOCK}
    if args.pipeline:
        from .bench_pipeline import bench_pipeline
        result["pipeline"] = bench_pipeline(minutes=args.pipeline_minutes)
    if args.json:
        json.dump(result, sys.stdout, indent=2)
        print()
        return 0
    print(f"Converter vs scipy.signal.upfirdn, same taps, {args.seconds} s stereo, 120 dB mask")
    print(f"{'route':>14} {'arith':>8} {'taps':>6} {'T':>4} {'ours s':>8} {'scipy s':>8} "
          f"{'speedup':>8} {'x real':>8} {'MMAC/s':>8}")
    for r in rows:
        print(f"{r['route']:>14} {r['arithmetic']:>8} {r['numtaps']:>6} {r['taps_per_phase']:>4} "
              f"{r['rateferry_s']:8.3f} {r['scipy_upfirdn_s']:8.3f} {r['speedup_vs_scipy']:7.1f}x "
              f"{r['x_realtime']:8.0f} {r['mmac_per_s']:8.0f}")
    if "pipeline" in result:
        from .bench_pipeline import print_pipeline
        print_pipeline(result["pipeline"])
    return 0


if __name__ == "__main__":
    sys.exit(main())
