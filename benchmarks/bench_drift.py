"""Drift measurement and correction speed, each figure beside its reference, in one run.

    PYTHONPATH=. python benchmarks/bench_drift.py                 # the 60-minute pair
    PYTHONPATH=. python benchmarks/bench_drift.py --minutes 2     # a quick look
    PYTHONPATH=. python benchmarks/bench_drift.py --json

* Measurement: a pair of recordings of one invented interview (two voices, each recorder near
  its own), the track made by scipy.signal.resample_poly at 40001/40000 (+25 ppm) and started
  0.5 s later; reference figure: the 10 s target for an hour. Also the streaming decimation's
  throughput at 48 kHz stereo, the part of the cost that grows with the source rate.
* Correction: the real-ratio converter (arbitrary path) on 48 kHz stereo, in x realtime, beside
  the exact polyphase converter for 44.1 -> 48 kHz with the same mask (the converter's usual
  speed).

Figures only; nothing here asserts a time.
"""

import argparse
import json
import sys
import time

import numpy as np
from scipy import signal

from webapp.dsp.design import design
from webapp.dsp.drift import ANALYSIS_RATE_HZ, decimated_mono, measure_drift
from webapp.dsp.polyphase import make_converter
from webapp.dsp.spec import preset
from webapp.dsp.timebase import TimeBase, timebase_converter, timebase_design

TARGET_MEASURE_S = 10.0     # issue 12: an hour's pair measured in under 10 s
BLOCK = 65536


def _talk(rng, frames, fs):
    x = rng.standard_normal(frames, dtype=np.float32)
    env = np.zeros(frames, dtype=np.float32)
    i = 0
    while i < frames:
        on = int(rng.exponential(1.5) * fs) + fs // 10
        env[i:i + on] = rng.uniform(0.3, 1.0)
        i += on + int(rng.exponential(0.6) * fs)
    return x * env * 0.1


def _pair(minutes, fs, rng):
    n = int(minutes * 60 * fs)
    a, b = _talk(rng, n + 2 * fs, fs), _talk(rng, n + 2 * fs, fs)
    ref = (a + 0.15 * b)[:n]
    track = signal.resample_poly(0.2 * a + b, 40001, 40000)[int(0.5 * fs):].astype(np.float32)
    return ref, track


def bench_measure(minutes, fs):
    rng = np.random.default_rng(12)
    ref, track = _pair(minutes, fs, rng)
    t0 = time.perf_counter()
    m = measure_drift(ref, fs, track, fs)
    seconds = time.perf_counter() - t0
    return dict(minutes=minutes, rate_hz=fs, seconds=seconds, target_s=TARGET_MEASURE_S,
                drift_ppm=m.drift_ppm, drift_ppm_truth=25.0, offset_ms=m.offset_ms,
                windows_used=m.windows_used, windows_total=m.windows_total)


def bench_decimation(seconds):
    x = np.random.default_rng(0).standard_normal((48000 * seconds, 2)).astype(np.float32)
    decimated_mono(x[:48000], 48000, ANALYSIS_RATE_HZ)      # design once (cached)
    t0 = time.perf_counter()
    decimated_mono(x, 48000, ANALYSIS_RATE_HZ)
    dt = time.perf_counter() - t0
    return dict(seconds_of_audio=seconds, seconds=dt, x_realtime=seconds / dt,
                hour_48k_stereo_s=3600 / (seconds / dt))


def _run_blocks(conv, x):
    conv.reset()
    for i in range(0, x.shape[0], BLOCK):
        conv.process(x[i:i + BLOCK])
    conv.flush()


def bench_correction(seconds, preset_name):
    spec = preset(preset_name)
    x = np.random.default_rng(1).standard_normal((48000 * seconds, 2)).astype(spec.arithmetic)
    tb = TimeBase(48000, 48000, 37.5, 120.0, frames_out=48000 * seconds)
    t0 = time.perf_counter()
    d = timebase_design(spec, tb)
    design_s = time.perf_counter() - t0
    conv = timebase_converter(tb, channels=2, designed=d)
    t0 = time.perf_counter()
    _run_blocks(conv, x)
    dt = time.perf_counter() - t0
    exact = make_converter(design(spec, 44100, 48000), channels=2)
    xe = x[:44100 * seconds]
    t0 = time.perf_counter()
    _run_blocks(exact, xe)
    de = time.perf_counter() - t0
    return dict(preset=preset_name, seconds_of_audio=seconds, design_s=design_s,
                x_realtime=seconds / dt, taps_per_phase=d.taps_per_phase, phases=d.phases,
                exact_44k1_to_48k_x_realtime=seconds / de)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, default=60.0, help="length of the measured pair")
    ap.add_argument("--rate", type=int, default=16000, help="rate of the measured pair (Hz)")
    ap.add_argument("--seconds", type=int, default=20, help="audio for the speed figures")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    out = dict(measure=bench_measure(args.minutes, args.rate),
               decimation=bench_decimation(args.seconds),
               correction=[bench_correction(args.seconds, p)
                           for p in ("spoken_word_delivery", "music_delivery")])
    if args.json:
        print(json.dumps(out, indent=2))
        return out
    m = out["measure"]
    print(f"measure {m['minutes']:g} min pair at {m['rate_hz']} Hz: {m['seconds']:.2f} s "
          f"(target < {m['target_s']:g} s); drift {m['drift_ppm']:.3f} ppm (truth 25), offset "
          f"{m['offset_ms']:.3f} ms, {m['windows_used']}/{m['windows_total']} windows")
    dm = out["decimation"]
    print(f"decimation 48 kHz stereo -> {ANALYSIS_RATE_HZ} Hz mono: {dm['x_realtime']:.0f}x "
          f"realtime (an hour: {dm['hour_48k_stereo_s']:.1f} s per recording)")
    for c in out["correction"]:
        print(f"correction {c['preset']}: {c['x_realtime']:.1f}x realtime 48 kHz stereo "
              f"({c['phases']} phases x {c['taps_per_phase']} taps, design {c['design_s']:.2f} s)"
              f"  | exact polyphase 44.1->48 kHz same mask: {c['exact_44k1_to_48k_x_realtime']:.1f}x")
    return out


if __name__ == "__main__":
    main(sys.argv[1:])
