"""The look-ahead true-peak limiter's cost per hour of stereo audio beside the conversion's, and
the shaped-dither quantiser's beside plain TPDF, in one run.

Run: ``python benchmarks/bench_limiter.py [--seconds 20] [--block 65536]`` (the runner,
``python -m benchmarks``, takes its figures from ``main()``).

Rows (seconds of work per hour of stereo 48 kHz audio, best of three, BLAS held to one thread
as in the pipeline; the reference of every row is the conversion 44.1 -> 48 kHz with the
"music_delivery" mask):

* the limiter (ceiling -1 dBTP) on programme-like noise pushed 12 dB (it limits often), as it
  is (it seldom needs to), and on a full-scale 19 kHz tone (every frame over the ceiling);
* the whole delivery chain as the pipeline runs it for a limited delivery: gain, limiter and
  16-bit quantiser with TPDF;
* the 16-bit quantiser with TPDF, and with shaped dither in the pipeline's blocks for it beside
  the plain per-sample error-feedback loop whose codes it equals (the rounding inside the loop
  is what keeps it from a linear filter; ``webapp.dsp.shaping`` runs many stretches at once).

Figures only; nothing here asserts a time. The helpers are bench_meters.py's.
"""

import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from bench_meters import (  # noqa: E402
    RATE_HZ, SOURCE_RATE_HZ, best_of, conversion, print_figures, programme, run_figures)
from webapp.dsp.dither import Quantizer, noise_transfer_taps  # noqa: E402
from webapp.dsp.shaping import shape_sequential  # noqa: E402
from webapp.dsp.limiter import TruePeakLimiter  # noqa: E402


def limited(x, block):
    def run():
        limiter = TruePeakLimiter(rate_hz=RATE_HZ, channels=2, ceiling_dbtp=-1.0)
        for i in range(0, x.shape[0], block):
            limiter.process(x[i:i + block])
        limiter.flush()
    return run


def chain(x, block):
    """Gain, limiter and 16-bit TPDF quantiser, block by block (the pipeline's order)."""
    def run():
        limiter = TruePeakLimiter(rate_hz=RATE_HZ, channels=2, ceiling_dbtp=-1.0)
        quantizer = Quantizer(bits="16", dither="tpdf", channels=2, rate_hz=RATE_HZ)
        for i in range(0, x.shape[0], block):
            quantizer.process(limiter.process(x[i:i + block] * 2.0))
        quantizer.process(limiter.flush())
    return run


def figures(seconds, block):
    rng = np.random.default_rng(1)
    x = programme(seconds, RATE_HZ, rng)
    source = programme(seconds, SOURCE_RATE_HZ, rng)
    tone = np.repeat(np.sin(2 * np.pi * 19000 * np.arange(x.shape[0]) / RATE_HZ)[:, None], 2, axis=1)
    per_hour = 3600.0 / seconds
    conv = best_of(3, conversion(source, block)) * per_hour
    reference = "conversion 44.1 -> 48 kHz, music_delivery (120 dB, float64)"

    def row(name, value):
        return dict(name=name, value=value, unit="s/hour", reference=reference,
                    reference_value=conv, ratio=value / conv)

    rows = [
        row("limiter, programme pushed 12 dB", best_of(3, limited(x * 10 ** (12 / 20), block)) * per_hour),
        row("limiter, programme as it is", best_of(3, limited(x, block)) * per_hour),
        row("limiter, full-scale 19 kHz tone", best_of(3, limited(tone, block)) * per_hour),
        row("gain + limiter + 16-bit TPDF quantiser", best_of(3, chain(x, block)) * per_hour),
    ]
    short = x[: int(RATE_HZ * min(seconds, 5.0))]
    quantizer = Quantizer(bits="16", dither="tpdf", channels=2, rate_hz=RATE_HZ)
    spent = best_of(1, lambda: quantizer.process(short))
    rows.append(row("16-bit quantiser, dither=tpdf", spent * 3600.0 * RATE_HZ / short.shape[0]))
    rows.extend(shaped_rows(x, per_hour))
    return rows


def shaped_rows(x, per_hour):
    """Shaped dither in the blocks the pipeline gives it (``Quantizer.preferred_frames``) beside
    the plain per-sample loop whose codes it equals, timed on the first 2 s."""
    quantizer = Quantizer(bits="16", dither="shaped", channels=2, rate_hz=RATE_HZ)
    size = quantizer.preferred_frames

    def lanes():
        for i in range(0, x.shape[0], size):
            quantizer.process(x[i:i + size])
    spent = best_of(1, lanes) * per_hour
    piece = x[: 2 * RATE_HZ] * 32768.0
    tpdf = np.zeros_like(piece)
    feedback = tuple(-noise_transfer_taps(RATE_HZ)[1:])

    def plain():
        for c in range(piece.shape[1]):
            shape_sequential(piece[:, c], tpdf[:, c], [0.0] * 9, feedback, -32768, 32767)
    loop = best_of(1, plain) * 3600.0 * RATE_HZ / piece.shape[0]
    reference = "the plain per-sample loop (shape_sequential), same codes"
    return [dict(name=f"16-bit quantiser, dither=shaped, blocks of {size} frames", value=spent,
                 unit="s/hour", reference=reference, reference_value=loop, ratio=spent / loop)]


def main(argv=None):
    return run_figures(argv, __doc__.splitlines()[0], "limiter and dither", figures)


if __name__ == "__main__":
    print_figures(main())
