"""Time the overview of a long recording (webapp.overview) against reading the same file alone.

    python scripts/bench_overview.py            # 60 minutes of stereo 44.1 kHz, 16-bit WAV
    python scripts/bench_overview.py --minutes 5

The file is programme-like (a slow sine chord with noise, one clipped stretch) and written to a
temporary folder, then removed. Figures printed side by side: the overview's time, and the
reference: one pass of webapp.media.read_blocks over the same file (the floor any streamed
analysis pays), plus the peak memory of the overview (tracemalloc).
"""

import argparse
import os
import tempfile
import time
import tracemalloc

import numpy as np
import soundfile as sf

from webapp import media
from webapp.overview import overview


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


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=int, default=60)
    ap.add_argument("--columns", type=int, default=1200)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "long.wav")
        make(path, args.minutes)
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
        print(f"{args.minutes} min stereo 44.1 kHz 16-bit WAV ({os.path.getsize(path) / 1e6:.0f} MB), "
              f"{args.columns} columns")
        print(f"  overview      {ov_s:7.2f} s   ({args.minutes * 60 / ov_s:6.0f} x real time), "
              f"peak traced memory {peak / 1e6:.1f} MB")
        print(f"  reference     {read_s:7.2f} s   (read_blocks alone)")
        print(f"  full scale {o['full_scale']['total']} samples, overs {o['overs']['total']}")


if __name__ == "__main__":
    main()
