"""Meter and limiter cost per hour of stereo audio beside the cost of a conversion, in one run.

Run: ``python benchmarks/bench_meters.py [--seconds 20] [--block 65536]`` (the runner,
``python -m benchmarks``, takes its figures from ``main()``).

Rows (seconds of work per hour of stereo audio, best of three, BLAS held to one thread as in
the pipeline):

* the conversion 44.1 -> 48 kHz with the "music_delivery" mask (120 dB, float64), the
  reference the meters are weighed against;
* the loudness meter (K-weighting and 100 ms sums);
* the true-peak meter (16x) on programme-like noise (most rows skip the second stage) and on a
  full-scale sine (none skip: the worst case);
* the true-peak limiter (ceiling -1 dBTP) on the programme pushed 12 dB (it limits often) and
  on the programme as it is (it seldom needs to);
* the true peak as plain scipy would do it: ``scipy.signal.upfirdn`` 16x with the same
  interpolator as one FIR, then the largest magnitude;
* the 16-bit quantiser with TPDF and with shaped dither.

Figures only; nothing here asserts a time.
"""

import argparse
import os
import sys
import time

import numpy as np
from scipy import signal
from threadpoolctl import threadpool_limits

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from webapp.dsp.design import design  # noqa: E402
from webapp.dsp.loudness import LoudnessMeter  # noqa: E402
from webapp.dsp.truepeak import TruePeakMeter  # noqa: E402
from webapp.dsp.oversample import prototype  # noqa: E402
from webapp.dsp.polyphase import make_converter  # noqa: E402
from webapp.dsp.spec import preset  # noqa: E402

RATE_HZ = 48000
SOURCE_RATE_HZ = 44100


def best_of(runs, fn):
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def programme(seconds, rate_hz, rng):
    """Noise under a slow, deep envelope: peaks are rare, as in programme material."""
    n = int(seconds * rate_hz)
    t = np.arange(n) / rate_hz
    envelope = (0.2 + np.abs(np.sin(2 * np.pi * 0.37 * t))) ** 3
    return 0.1 * rng.standard_normal((n, 2)) * envelope[:, None]


def streamed(make, x, block):
    def run():
        meter = make()
        for i in range(0, x.shape[0], block):
            meter.process(x[i:i + block])
        meter.result()
    return run


def conversion(x, block):
    d = design(preset("music_delivery"), SOURCE_RATE_HZ, RATE_HZ)

    def run():
        conv = make_converter(d, channels=2)
        for i in range(0, x.shape[0], block):
            conv.process(x[i:i + block])
        conv.flush()
    return run


def plain_true_peak(x):
    h, _ = prototype()
    return lambda: np.abs(signal.upfirdn(h, x, 16, axis=0)).max(axis=0)


def figures(seconds, block):
    rng = np.random.default_rng(1)
    x = programme(seconds, RATE_HZ, rng)
    source = programme(seconds, SOURCE_RATE_HZ, rng)
    sine = np.repeat(0.9 * np.sin(2 * np.pi * 997 * np.arange(x.shape[0]) / RATE_HZ)[:, None], 2, axis=1)
    per_hour = 3600.0 / seconds
    conv = best_of(3, conversion(source, block)) * per_hour
    reference = "conversion 44.1 -> 48 kHz, music_delivery (120 dB, float64)"

    def row(name, value):
        return dict(name=name, value=value, unit="s/hour", reference=reference, reference_value=conv,
                    ratio=value / conv)

    rows = [
        row("loudness meter", best_of(3, streamed(lambda: LoudnessMeter(rate_hz=RATE_HZ, channels=2),
                                                  x, block)) * per_hour),
        row("true-peak meter 16x, programme-like noise",
            best_of(3, streamed(lambda: TruePeakMeter(rate_hz=RATE_HZ, channels=2), x, block)) * per_hour),
        row("true-peak meter 16x, full-scale sine (worst case)",
            best_of(3, streamed(lambda: TruePeakMeter(rate_hz=RATE_HZ, channels=2), sine, block)) * per_hour),
    ]
    short = x[: int(RATE_HZ * min(seconds, 5.0))]
    rows.append(row("true peak, plain scipy upfirdn 16x (same FIR)",
                    best_of(1, plain_true_peak(short)) * 3600.0 * RATE_HZ / short.shape[0]))
    rows.append(accuracy_row())
    return rows     # the limiter and the quantisers: benchmarks/bench_limiter.py


def accuracy_row():
    """Speed must not cost accuracy: the largest difference between the true-peak meter and an
    independent 16x reconstruction (``scipy.signal.resample_poly`` with a 2049-tap Kaiser
    low-pass, beta 12) on tones at 3/8, 5/12, 7/16 and 9/20 of the rate, started so that no
    sample is near a crest (the sample peak is cos(pi/m) below the true one)."""
    taps = signal.firwin(2049, 1 / 16, window=("kaiser", 12.0))
    worst = 0.0
    for k, m in ((3, 8), (5, 12), (7, 16), (9, 20)):
        n = np.arange(int(0.25 * RATE_HZ))
        x = 0.89 * np.sin(2 * np.pi * k / m * n + np.pi / 2 - np.pi / m)
        x *= np.minimum(1.0, np.minimum(n, n[::-1]) / (0.02 * RATE_HZ))     # faded ends
        ref = 20 * np.log10(np.abs(signal.resample_poly(x, 16, 1, window=taps)).max())
        ours = TruePeakMeter(rate_hz=RATE_HZ, channels=1)
        ours.process(x[:, None])
        worst = max(worst, abs(ours.result().true_peak_dbtp - ref))
    return dict(name="true peak near Nyquist (0.375-0.45 fs): largest error", value=float(worst),
                unit="dB", reference="16x resample_poly, 2049-tap Kaiser", reference_value=0.0,
                target="< 0.1 dB")


def run_figures(argv, description, what, figures_of):
    """The entry point both this bench and bench_limiter.py share: ``--seconds`` of stereo at
    48 kHz in ``--block``-frame blocks, BLAS held to one thread as in the pipeline; returns the
    runner's dict."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--block", type=int, default=65536)
    args = parser.parse_args(argv)
    with threadpool_limits(limits=1, user_api="blas"):
        rows = figures_of(args.seconds, args.block)
    return dict(title=f"{what}, stereo {RATE_HZ} Hz, {args.seconds:g} s of audio, blocks of "
                      f"{args.block} frames, BLAS 1 thread, seconds per hour of audio",
                load_average=list(os.getloadavg()), figures=rows)


def print_figures(result):
    print(result["title"], "| load average", " ".join(f"{v:.2f}" for v in result["load_average"]))
    for r in result["figures"]:
        ratio = f" (x{r['ratio']:.2f})" if "ratio" in r else ""
        print(f"{r['name']:56s}  {r['value']:8.3f} {r['unit']:6s} | {r['reference']}: "
              f"{r['reference_value']:.2f}{ratio}")


def main(argv=None):
    return run_figures(argv, __doc__.splitlines()[0], "meters", figures)


if __name__ == "__main__":
    print_figures(main())
