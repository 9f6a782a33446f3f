"""Drift measurement and correction speed, each figure beside its reference, in one run.

    PYTHONPATH=. python benchmarks/bench_drift.py                 # the 60-minute pair
    PYTHONPATH=. python benchmarks/bench_drift.py --minutes 2     # a quick look
    PYTHONPATH=. python benchmarks/bench_drift.py --json
    PYTHONPATH=. python benchmarks/bench_drift.py --file-minutes 60   # + a 48 kHz stereo file pair

* Measurement: a pair of recordings of one invented interview (two voices, each recorder near
  its own), the track made by scipy.signal.resample_poly at 40001/40000 (+25 ppm) and started
  0.5 s later; reference figure: the 10 s target for an hour. Also the streaming decimation's
  throughput at 48 kHz stereo, the part of the cost that grows with the source rate.
* Correction: the real-ratio converter (arbitrary path) on 48 kHz stereo, in x realtime, beside
  the exact polyphase converter for 44.1 -> 48 kHz with the same mask (the converter's usual
  speed), and beside itself with its windows gathered by integer indexing (the general path;
  a drift correction reads them in place).
* With ``--file-minutes M``: a pair of M-minute 48 kHz stereo 16-bit WAV files is written to a
  temporary folder (the track made by the time base converter itself at -25 ppm inverse, so
  that nothing holds the hour in memory) and measured from disk as ``rateferry drift`` does
  (decoding included); the files are removed afterwards.

Figures only; nothing here asserts a time.
"""

import argparse
import json
import sys
import time

import numpy as np
from scipy import signal

import os
import resource
import tempfile

import soundfile as sf

from webapp import drift_files
from webapp.dsp import polyphase
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


def _timed(conv, x):
    t0 = time.perf_counter()
    _run_blocks(conv, x)
    return time.perf_counter() - t0


def bench_correction(seconds, preset_name):
    spec = preset(preset_name)
    x = np.random.default_rng(1).standard_normal((48000 * seconds, 2)).astype(spec.arithmetic)
    tb = TimeBase(48000, 48000, 37.5, 120.0, frames_out=48000 * seconds)
    t0 = time.perf_counter()
    d = timebase_design(spec, tb)
    design_s = time.perf_counter() - t0
    conv = timebase_converter(tb, channels=2, designed=d)
    dt = _timed(conv, x)
    in_place = polyphase._MIN_STRETCH
    try:
        polyphase._MIN_STRETCH = 1 << 62          # every window gathered
        dg = _timed(conv, x)
    finally:
        polyphase._MIN_STRETCH = in_place
    exact = make_converter(design(spec, 44100, 48000), channels=2)
    xe = x[:44100 * seconds]
    t0 = time.perf_counter()
    _run_blocks(exact, xe)
    de = time.perf_counter() - t0
    return dict(preset=preset_name, seconds_of_audio=seconds, design_s=design_s,
                x_realtime=seconds / dt, gathered_x_realtime=seconds / dg,
                taps_per_phase=d.taps_per_phase, phases=d.phases,
                exact_44k1_to_48k_x_realtime=seconds / de)


def _write_pair(folder, minutes, fs, channels):
    """An M-minute stereo pair on disk, written block by block (16-bit WAV)."""
    n = int(minutes * 60 * fs)
    rng = np.random.default_rng(21)
    ref_path, trk_path = os.path.join(folder, "ref.wav"), os.path.join(folder, "track.wav")
    # the track reads the source at t_ref = (t_track - offset) / (1 + e): a time base of
    # drift 1/(1+e) - 1 and start -offset / (1 + e) on the source
    e, offset_ms = 25e-6, 700.0
    gen = TimeBase(fs, fs, (1 / (1 + e) - 1) * 1e6, -offset_ms / (1 + e), frames_out=n)
    conv = timebase_converter(gen, channels=1, spec=preset("spoken_word_delivery"))
    with sf.SoundFile(ref_path, "w", fs, channels, "PCM_16") as ref, \
            sf.SoundFile(trk_path, "w", fs, channels, "PCM_16") as trk:
        for i in range(0, n, 10 * fs):
            src = _talk(rng, min(10 * fs, n - i), fs)
            ref.write(np.repeat(src[:, None], channels, axis=1)
                      + 0.003 * rng.standard_normal((src.size, channels)))
            y = conv.process(src[:, None])[:, 0]
            trk.write(np.repeat(0.7 * y[:, None], channels, axis=1))
        y = conv.flush()[:, 0]
        trk.write(np.repeat(0.7 * y[:, None], channels, axis=1))
    return ref_path, trk_path, e * 1e6, offset_ms


def bench_measure_files(minutes, fs=48000, channels=2):
    with tempfile.TemporaryDirectory(prefix="rateferry-drift-bench-") as folder:
        t0 = time.perf_counter()
        ref, trk, drift_ppm, offset_ms = _write_pair(folder, minutes, fs, channels)
        write_s = time.perf_counter() - t0
        rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        t0 = time.perf_counter()
        m = drift_files.measure_files(ref, trk)
        seconds = time.perf_counter() - t0
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        size = os.path.getsize(ref) + os.path.getsize(trk)
    return dict(minutes=minutes, rate_hz=fs, channels=channels, bytes_on_disk=size,
                write_s=write_s, seconds=seconds, target_s=TARGET_MEASURE_S,
                drift_ppm=m.drift_ppm, drift_ppm_truth=drift_ppm, offset_ms=m.offset_ms,
                offset_ms_truth=offset_ms, windows_used=m.windows_used,
                windows_total=m.windows_total, peak_rss_mb=max(rss, rss0) / 1024)


def _figures(out):
    m = out["measure"]
    rows = [dict(name=f"measure a {m['minutes']:g} min pair at {m['rate_hz']} Hz",
                 value=m["seconds"], unit="s", reference="target", reference_value=m["target_s"])]
    if "measure_files" in out:
        f = out["measure_files"]
        rows.append(dict(name=f"measure a {f['minutes']:g} min {f['rate_hz']} Hz stereo file pair",
                         value=f["seconds"], unit="s", reference="target",
                         reference_value=f["target_s"]))
    for c in out["correction"]:
        rows.append(dict(name=f"correction {c['preset']} 48 kHz stereo", value=c["x_realtime"],
                         unit="x realtime", reference="windows gathered",
                         reference_value=c["gathered_x_realtime"],
                         ratio=c["x_realtime"] / c["gathered_x_realtime"]))
        rows.append(dict(name=f"correction {c['preset']} 48 kHz stereo", value=c["x_realtime"],
                         unit="x realtime", reference="exact 44.1->48 kHz same mask",
                         reference_value=c["exact_44k1_to_48k_x_realtime"],
                         ratio=c["x_realtime"] / c["exact_44k1_to_48k_x_realtime"]))
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, default=60.0, help="length of the measured pair")
    ap.add_argument("--rate", type=int, default=16000, help="rate of the measured pair (Hz)")
    ap.add_argument("--seconds", type=int, default=20, help="audio for the speed figures")
    ap.add_argument("--file-minutes", type=float, default=0.0,
                    help="also measure a 48 kHz stereo file pair this long (written to a "
                         "temporary folder, about 11.5 MB per minute per file)")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    out = dict(measure=bench_measure(args.minutes, args.rate),
               decimation=bench_decimation(args.seconds),
               correction=[bench_correction(args.seconds, p)
                           for p in ("spoken_word_delivery", "music_delivery")])
    if args.file_minutes > 0:
        out["measure_files"] = bench_measure_files(args.file_minutes)
    out["figures"] = _figures(out)
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
              f"  | windows gathered: {c['gathered_x_realtime']:.1f}x"
              f"  | exact polyphase 44.1->48 kHz same mask: {c['exact_44k1_to_48k_x_realtime']:.1f}x")
    if "measure_files" in out:
        f = out["measure_files"]
        print(f"measure {f['minutes']:g} min {f['rate_hz']} Hz stereo 16-bit WAV pair from disk "
              f"({f['bytes_on_disk'] / 1e9:.2f} GB): {f['seconds']:.2f} s (target < "
              f"{f['target_s']:g} s); drift {f['drift_ppm']:.3f} ppm (truth "
              f"{f['drift_ppm_truth']:g}), offset {f['offset_ms']:.3f} ms (truth "
              f"{f['offset_ms_truth']:g}), peak RSS {f['peak_rss_mb']:.0f} MB")
    return out


if __name__ == "__main__":
    main(sys.argv[1:])
