"""Time the artefact audit on a few routes, beside scipy.signal doing its conversion step.

    python benchmarks/bench_audit.py [--repeat N]

For each route: the design time, the whole audit (best of N), and the conversion step inside it
(every test signal as one channel of one converter call) timed for our streaming converter and
for scipy.signal.upfirdn with the same taps on the same channels (single-stage polyphase
designs only), with the largest difference between the two outputs.
"""

import argparse
from dataclasses import replace
import math
import os
import sys
import time

import numpy as np
from scipy import signal

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from webapp.dsp.audit import audit, convert_channels, settle_time_s  # noqa: E402
from webapp.dsp.polyphase import output_length  # noqa: E402
from webapp.dsp.spec import preset  # noqa: E402
from webapp.dsp.stages import choose_plan  # noqa: E402

ROUTES = [
    ("music_delivery", 44100, 48000, "single"),
    ("music_delivery", 48000, 44100, "single"),
    ("archival_master", 96000, 44100, "single"),
    ("spoken_word_delivery", 48000, 16000, "single"),
    ("live_voice_pipeline", 48000, 16000, "single"),
    ("music_delivery", 48000, 8000, "auto"),
    ("quick_preview", 44100, 44101, "single"),
]


def best(fn, repeat):
    times = []
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def upfirdn_aligned(d, x):
    """scipy.signal.upfirdn with the design's taps, delay removed, cut to ceil(n up / down).

    Aligned output n is sum_m h[n down + D - m up] x[m]; prepending p = -D mod down zeros to h
    makes the shift a whole number (D + p) / down of upfirdn's output samples.
    """
    pad = (-d.delay_samples) % d.down
    h = np.concatenate([np.zeros(pad), d.taps])
    y = signal.upfirdn(h, x, d.up, d.down, axis=0)
    n = output_length(x.shape[0], d.up, d.down)
    start = (d.delay_samples + pad) // d.down
    y = y[start:start + n]
    if y.shape[0] < n:
        y = np.concatenate([y, np.zeros((n - y.shape[0], x.shape[1]))])
    return y


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    rows = []
    for name, fs_in, fs_out, stages in ROUTES:
        spec = replace(preset(name), stages=stages)
        t_design, d = best(lambda: choose_plan(spec, fs_in, fs_out), 1)
        if len(getattr(d, "stages", ())) == 1:      # a one-stage plan is its design
            d = d.stages[0]
        t_audit, r = best(lambda: audit(d), args.repeat)
        # the conversion step with the audit's channel count and length
        span = settle_time_s(d)
        n_in = fs_in + 2 * (int(math.ceil(span * fs_in)) + 4)
        channels = 5 + int(np.ceil(r.deviation_hz.size / 149)) + 2
        x = np.random.default_rng(1).standard_normal((n_in, channels)) * 0.1
        t_ours, y = best(lambda: convert_channels(d, x), args.repeat)
        row = dict(route=f"{name} {fs_in}->{fs_out}" + (" (plan)" if hasattr(d, "stages") else ""),
                   design_s=t_design, audit_s=t_audit, convert_s=t_ours, passes=bool(r.passes))
        if not hasattr(d, "stages") and d.path == "polyphase":
            t_ref, y_ref = best(lambda: upfirdn_aligned(d, x), args.repeat)
            row.update(upfirdn_s=t_ref, max_diff=float(np.max(np.abs(y - y_ref))))
        rows.append(row)
    figures = []
    for row in rows:
        figures.append(dict(name=f"{row['route']} audit", value=row["audit_s"], unit="s"))
        fig = dict(name=f"{row['route']} conversion step", value=row["convert_s"], unit="s")
        if "upfirdn_s" in row:
            fig.update(reference="scipy.signal.upfirdn", reference_value=row["upfirdn_s"],
                       ratio=round(row["upfirdn_s"] / row["convert_s"], 1))
        figures.append(fig)
    return dict(title="artefact audit per design; its conversion step beside upfirdn",
                figures=figures, routes=rows)


def print_table(result):
    print(f"{'route':40s} {'design s':>9s} {'audit s':>8s} {'convert s':>10s} "
          f"{'upfirdn s':>10s} {'ratio':>6s} {'max diff':>9s} {'passes':>6s}")
    for r in result["routes"]:
        if "upfirdn_s" in r:
            ref = f"{r['upfirdn_s']:10.3f} {r['upfirdn_s'] / r['convert_s']:6.1f} {r['max_diff']:9.1e}"
        else:
            ref = "       n/a    n/a       n/a"
        print(f"{r['route']:40s} {r['design_s']:9.3f} {r['audit_s']:8.3f} {r['convert_s']:10.3f} "
              f"{ref} {str(r['passes']):>6s}")


if __name__ == "__main__":
    print_table(main())
