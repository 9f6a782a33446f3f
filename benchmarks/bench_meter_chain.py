"""Seconds per minute of stereo 48 kHz audio for the meters and the quantiser, beside plain scipy.

Run: ``python benchmarks/bench_meter_chain.py [--seconds 60] [--block 65536]`` (the runner,
``python -m benchmarks``, takes its figures from ``main()``).

The plain versions are what one would write without streaming: K-weighting the whole array
with scipy.signal.sosfilt and averaging 400 ms blocks; over-sampling the whole array with
scipy.signal.upfirdn and taking the largest magnitude. Each figure is the best of three runs.
"""

import argparse
import os
import sys
import time

import numpy as np
from scipy import signal

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from webapp.dsp.dither import Quantizer  # noqa: E402
from webapp.dsp.loudness import (  # noqa: E402
    LoudnessMeter, TruePeakMeter, annex2_interpolator, k_weighting,
)

RATE_HZ = 48000


def best_of(runs, fn):
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def programme(seconds, rng):
    """Noise under a slow, deep envelope: peaks are rare, as in programme material."""
    n = int(seconds * RATE_HZ)
    t = np.arange(n) / RATE_HZ
    envelope = (0.2 + np.abs(np.sin(2 * np.pi * 0.37 * t))) ** 3
    return 0.1 * rng.standard_normal((n, 2)) * envelope[:, None]


def streamed(meter_class, x, block, **kw):
    def run():
        meter = meter_class(rate_hz=RATE_HZ, channels=2, **kw)
        for i in range(0, x.shape[0], block):
            meter.process(x[i:i + block])
        meter.result()
    return run


def plain_loudness(x):
    def run():
        y = signal.sosfilt(k_weighting(RATE_HZ), x, axis=0)
        power = (y * y).sum(axis=1)
        step = RATE_HZ // 10
        steps = power[: power.size // step * step].reshape(-1, step).sum(axis=1)
        blocks = np.convolve(steps, np.ones(4), "valid") / (4 * step)
        return -0.691 + 10 * np.log10(blocks)
    return run


def plain_true_peak(x):
    prototype = annex2_interpolator(4).T.reshape(-1)
    return lambda: np.abs(signal.upfirdn(prototype, x, 4, axis=0)).max(axis=0)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument("--block", type=int, default=65536)
    args = parser.parse_args(argv)
    rng = np.random.default_rng(1)
    x = programme(args.seconds, rng)
    sine = np.repeat(0.9 * np.sin(2 * np.pi * 997 * np.arange(x.shape[0]) / RATE_HZ)[:, None], 2, axis=1)
    per_minute = 60.0 / args.seconds          # seconds of work -> seconds per minute of audio
    loud = best_of(3, streamed(LoudnessMeter, x, args.block)) * per_minute
    loud_plain = best_of(3, plain_loudness(x)) * per_minute
    peak_plain = best_of(3, plain_true_peak(x)) * per_minute
    rows = [
        dict(name="loudness meter (streamed)", value=loud, unit="s/min",
             reference="plain sosfilt on the whole array", reference_value=loud_plain),
        dict(name="true-peak meter, programme-like noise",
             value=best_of(3, streamed(TruePeakMeter, x, args.block)) * per_minute, unit="s/min",
             reference="plain upfirdn 4x on the whole array", reference_value=peak_plain),
        dict(name="true-peak meter, full-scale sine (no row skipped)",
             value=best_of(3, streamed(TruePeakMeter, sine, args.block)) * per_minute,
             unit="s/min", reference="plain upfirdn 4x on the whole array",
             reference_value=peak_plain),
    ]
    # the shaped quantiser is a per-sample loop: time 5 s of audio and scale
    short = x[: int(RATE_HZ * min(args.seconds, 5.0))]
    for dither in ("tpdf", "shaped"):
        quantizer = Quantizer(bits="16", dither=dither, channels=2, rate_hz=RATE_HZ)
        seconds = best_of(1, lambda q=quantizer: q.process(short))
        rows.append(dict(name=f"16-bit quantiser, dither={dither}",
                         value=seconds * 60.0 * RATE_HZ / short.shape[0], unit="s/min"))
    return dict(title=f"meters and quantiser, stereo {RATE_HZ} Hz, {args.seconds:g} s of audio, "
                      f"blocks of {args.block} frames, seconds per minute of audio",
                figures=rows)


if __name__ == "__main__":
    result = main()
    print(result["title"])
    for r in result["figures"]:
        ref = f"   | {r['reference']}: {r['reference_value']:.3f}" if "reference" in r else ""
        print(f"{r['name']:52s}  {r['value']:8.3f}{ref}")
