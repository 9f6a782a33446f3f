"""Whole-file pipeline benchmark: time and peak memory, ours against a plain scipy pipeline.

Ours: read FLAC in blocks -> 44100 -> 48000 at the music_delivery preset -> TPDF dither to 16 bit
-> write FLAC (plus loudness and true-peak meters on source and output, which the plain pipeline
does not do). Plain: soundfile.read the whole file -> scipy.signal.resample_poly(160, 147) with
its default filter (Kaiser beta 5, 20 taps per phase: far below the 120 dB mask) -> soundfile.write
16-bit FLAC; and the same plain pipeline given our 120 dB taps, for equal quality. Each runs in its own process so peak RSS (ru_maxrss) is its own.

    python -m webapp.bench_pipeline --minutes 10
    python -m webapp.bench_pipeline --memory 10 60     # rateferry convert's peak RSS vs duration
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap

import numpy as np

_CHILD = textwrap.dedent("""
    import json, resource, sys, time
    kind, src, dst = sys.argv[1:4]
    t0 = time.perf_counter()
    if kind == "rateferry":
        from webapp.jobs import convert_file
        from webapp.delivery import Delivery
        from webapp.dsp.spec import preset
        convert_file(src, dst, spec=preset("music_delivery"), fs_out=48000,
                     delivery=Delivery(bits="16", dither="tpdf"))
    else:
        import soundfile as sf
        from scipy import signal
        window = ("kaiser", 5.0)
        if kind == "scipy-same-taps":
            from webapp.dsp.design import design
            from webapp.dsp.spec import preset
            window = design(preset("music_delivery"), 44100, 48000).taps / 160
        x, fs = sf.read(src)
        y = signal.resample_poly(x, 160, 147, window=window, axis=0)
        sf.write(dst, y, 48000, subtype="PCM_16", format="FLAC")
    t = time.perf_counter() - t0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(json.dumps({"seconds": t, "peak_rss_mb": rss}))
""")


def make_source(path, minutes, *, rate=44100, fmt="FLAC", subtype="PCM_16"):
    """Write a stereo noise-and-tones file of ``minutes`` in blocks (memory stays small)."""
    import soundfile as sf
    rng = np.random.default_rng(1)
    frames = int(minutes * 60 * rate)
    block = rate * 10
    with sf.SoundFile(path, "w", samplerate=rate, channels=2, format=fmt, subtype=subtype) as f:
        for start in range(0, frames, block):
            n = min(block, frames - start)
            t = (start + np.arange(n)) / rate
            tone = 0.3 * np.sin(2 * np.pi * 997 * t)[:, None]
            f.write(tone + 0.05 * rng.standard_normal((n, 2)))


def _run(kind, src, dst):
    env = dict(os.environ)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env["PYTHONPATH"] = root + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", _CHILD, kind, src, dst], env=env,
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def bench_pipeline(minutes=10.0):
    with tempfile.TemporaryDirectory() as tmp:
        src = os.path.join(tmp, "source.flac")
        make_source(src, minutes)
        ours = _run("rateferry", src, os.path.join(tmp, "ours.flac"))
        plain = _run("scipy", src, os.path.join(tmp, "plain.flac"))
        same = _run("scipy-same-taps", src, os.path.join(tmp, "same.flac"))
    return dict(minutes=minutes, rateferry=ours, scipy_plain=plain, scipy_same_taps=same,
                speedup_vs_scipy=plain["seconds"] / ours["seconds"],
                speedup_vs_scipy_same_taps=same["seconds"] / ours["seconds"],
                memory_ratio=plain["peak_rss_mb"] / ours["peak_rss_mb"])


def memory_vs_duration(minutes_list):
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for m in minutes_list:
            src = os.path.join(tmp, f"src_{m}.wav")
            make_source(src, m, fmt="WAV")
            r = _run("rateferry", src, os.path.join(tmp, f"out_{m}.flac"))
            rows.append(dict(minutes=m, **r))
            os.remove(src)
    return rows


def print_pipeline(p):
    print(f"\nWhole file pipeline, {p['minutes']:g} min stereo FLAC 44100 -> 48000, 16-bit TPDF:")
    print(f"  rateferry (streamed, meters on): {p['rateferry']['seconds']:7.2f} s, "
          f"peak RSS {p['rateferry']['peak_rss_mb']:7.1f} MB")
    print(f"  scipy resample_poly (whole file): {p['scipy_plain']['seconds']:7.2f} s, "
          f"peak RSS {p['scipy_plain']['peak_rss_mb']:7.1f} MB")
    print(f"  scipy resample_poly, our taps:    {p['scipy_same_taps']['seconds']:7.2f} s, "
          f"peak RSS {p['scipy_same_taps']['peak_rss_mb']:7.1f} MB")
    print(f"  speedup {p['speedup_vs_scipy']:.1f}x against the default filter, "
          f"{p['speedup_vs_scipy_same_taps']:.1f}x at equal quality; memory "
          f"{p['memory_ratio']:.1f}x less")


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python -m webapp.bench_pipeline")
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--memory", type=float, nargs="*", default=None,
                    help="durations in minutes for the peak-RSS-vs-duration table")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    if args.memory:
        rows = memory_vs_duration(args.memory)
        if args.json:
            print(json.dumps({"memory": rows}, indent=2))
        else:
            for r in rows:
                print(f"{r['minutes']:6g} min: {r['seconds']:7.1f} s, peak RSS "
                      f"{r['peak_rss_mb']:.1f} MB")
        return 0
    p = bench_pipeline(args.minutes)
    if args.json:
        print(json.dumps(p, indent=2))
    else:
        print_pipeline(p)
    return 0


if __name__ == "__main__":
    sys.exit(main())
