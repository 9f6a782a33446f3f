"""Time the overview of a long recording (webapp.overview) against reading the same file alone.

    python benchmarks/bench_overview.py            # 60 minutes of stereo 44.1 kHz, 16-bit WAV
    python benchmarks/bench_overview.py --minutes 5

The file is programme-like (a slow sine chord with noise, one clipped stretch) and written to a
temporary folder, then removed. Figures printed side by side: the overview's time, and the
reference: one pass of webapp.media.read_blocks over the same file (the floor any streamed
analysis pays), plus the peak memory of the overview (tracemalloc).
"""

import argparse
import os
import sys
import tempfile
import time
import tracemalloc

import numpy as np
import soundfile as sf

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from webapp import media  # noqa: E402
from webapp.overview import overview  # noqa: E402


def make(path, minutes, rate=44100):
    rng = np.random.default_rng(20261201)
    block = rate * 10
    with sf.SoundFile(path, "w", samplerate=rate, channels=2, subtype="PCM_16") as f:
        for i in range(minutes * 6):
            t = (np.arange(block) + i * block) / rate
            x = 0.2 * np.sin(2 * np.pi * 220 * t) + 0.1 * np.sin(2 * np.pi * 3300 * t) \
                + 0.02 * rng.standard_normal(block)
            if i == 3:
                x[:2000] = 1.0            # a clipped stretch
            f.write(np.column_stack([x, 0.8 * x]))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=int, default=60)
    ap.add_argument("--columns", type=int, default=1200)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "long.wav")
        make(path, args.minutes)
        size_mb = os.path.getsize(path) / 1e6
        t0 = time.perf_counter()
        for _ in media.read_blocks(path, blocksize=1 << 17):
            pass
        read_s = time.perf_counter() - t0
        tracemalloc.start()
        t0 = time.perf_counter()
        o = overview(path, columns=args.columns)
        ov_s = time.perf_counter() - t0
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    label = f"overview of {args.minutes} min stereo 44.1 kHz WAV ({size_mb:.0f} MB)"
    return dict(
        title="the overview of a long recording beside reading it",
        figures=[dict(name=label, value=round(ov_s, 2), unit="s",
                      reference="webapp.media.read_blocks alone", reference_value=round(read_s, 2)),
                 dict(name="overview peak traced memory", value=round(peak / 1e6, 1), unit="MB")],
        realtime_factor=round(args.minutes * 60 / ov_s), full_scale=o["full_scale"]["total"],
        overs=o["overs"]["total"], columns=args.columns)


if __name__ == "__main__":
    r = main()
    for f in r["figures"]:
        ref = f" (reference: {f['reference']} {f['reference_value']} {f['unit']})" if "reference" in f else ""
        print(f"{f['name']}: {f['value']} {f['unit']}{ref}")
    print(f"real-time factor {r['realtime_factor']}, full scale {r['full_scale']}, overs {r['overs']}")
