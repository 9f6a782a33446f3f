"""The whole file, in one run: the I/O floor, ``rateferry convert``, and plain scipy.

    python benchmarks/bench_pipeline.py                   # 2 minutes of stereo
    python benchmarks/bench_pipeline.py --minutes 60      # the hour of the speed figures
    python benchmarks/bench_pipeline.py --memory 2 10     # rateferry's peak RSS against duration
    python benchmarks/bench_pipeline.py --stages          # CPU seconds of each pipeline thread
    python benchmarks/bench_pipeline.py --dither shaped   # rateferry with shaped dither

The source is N minutes of speech-like stereo (noise through two resonances under a syllable
envelope with pauses), 44.1 kHz 16-bit FLAC; the target 48 kHz 16-bit FLAC with TPDF dither.
Each contender runs in its own process, timed from outside (wall seconds) with its own peak
RSS from ``os.wait4``:

* I/O floor: FLAC decode + FLAC encode alone, in blocks, one thread, no conversion;
* ``rateferry convert --to 48000 --bits 16 --dither tpdf --quiet`` (the console script's code,
  ``webapp.cli:main``, so the checkout on PYTHONPATH is the one measured): meters on both sides;
* plain scipy: read the whole file, ``scipy.signal.resample_poly`` with a 120 dB Kaiser filter
  (``kaiserord``/``firwin`` for the same passband and stopband edges as the music_delivery
  mask), add TPDF dither, write 16-bit FLAC.

Figures only; nothing asserts a time.
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import textwrap
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)      # --stages imports the checkout's webapp in this process
RATE_IN, RATE_OUT = 44100, 48000

_IO_FLOOR = textwrap.dedent("""
    import sys, soundfile as sf
    src, dst = sys.argv[1:3]
    info = sf.info(src)
    with sf.SoundFile(dst, "w", samplerate=info.samplerate, channels=info.channels,
                      format="FLAC", subtype="PCM_16") as out:
        for block in sf.blocks(src, blocksize=65536, dtype="int16"):
            out.write(block)
""")

_PLAIN_SCIPY = textwrap.dedent("""
    import sys, numpy as np, soundfile as sf
    from scipy import signal
    src, dst = sys.argv[1:3]
    up, down, fs_in, fs_out = 160, 147, 44100, 48000
    passband, stopband = 19845.0, 22050.0        # the music_delivery mask's edges here
    fs_filter = fs_in * up
    numtaps, beta = signal.kaiserord(120.0, (stopband - passband) / (fs_filter / 2))
    h = signal.firwin(numtaps | 1, (passband + stopband) / 2, window=("kaiser", beta), fs=fs_filter)
    x, fs = sf.read(src)
    y = signal.resample_poly(x, up, down, window=h, axis=0)
    rng = np.random.default_rng(0)
    lsb = 1.0 / 32768
    y = y + (rng.random(y.shape) - rng.random(y.shape)) * lsb     # TPDF, +-1 LSB
    sf.write(dst, np.clip(np.round(y * 32768), -32768, 32767).astype(np.int16), fs_out,
             format="FLAC", subtype="PCM_16")
""")

_RATEFERRY = "import sys; from webapp.cli import main; sys.exit(main())"


def make_source(path, minutes, *, rate=RATE_IN, fmt="FLAC", subtype="PCM_16", seed=1):
    """Write ``minutes`` of speech-like stereo in 10 s blocks (memory stays small).

    White noise through two resonances (about 500 Hz and 1.5 kHz, the region of the first two
    formants of speech, common practice), under a 4 Hz syllable envelope with a pause of about
    0.4 s every 3 s; the right channel is the left delayed by 0.3 ms with its own noise, so the
    channels differ as a stereo room recording would. The content is our own, for timing only.
    """
    import soundfile as sf
    from scipy import signal
    rng = np.random.default_rng(seed)
    frames = int(minutes * 60 * rate)
    block = rate * 10
    sos = np.vstack([signal.butter(2, [400, 700], "bandpass", fs=rate, output="sos"),
                     signal.butter(2, [1200, 1900], "bandpass", fs=rate, output="sos")])
    zi = np.zeros((sos.shape[0], 2, 2))
    delay = int(0.0003 * rate)
    with sf.SoundFile(path, "w", samplerate=rate, channels=2, format=fmt, subtype=subtype) as f:
        for start in range(0, frames, block):
            n = min(block, frames - start)
            t = (start + np.arange(n)) / rate
            env = np.abs(np.sin(2 * np.pi * 2.0 * t)) ** 1.5 * ((t % 3.0) > 0.4)
            noise = rng.standard_normal((n, 2))
            noise[:, 1] = 0.7 * np.roll(noise[:, 0], delay) + 0.3 * noise[:, 1]
            y, zi = signal.sosfilt(sos, noise, axis=0, zi=zi)
            f.write(np.clip(0.25 * y * env[:, None], -1, 1))


def _measure(cmd):
    """Run ``cmd`` with the checkout first on the path; wall seconds and the child's peak RSS.

    The peak RSS comes from ``/usr/bin/time`` when it exists: a child forked straight from this
    (numpy-laden) process would carry this process's resident size into its own high-water mark.
    """
    env = dict(os.environ)
    env["PYTHONPATH"] = ROOT + os.pathsep + env.get("PYTHONPATH", "")
    timer = os.path.exists("/usr/bin/time")
    full = ["/usr/bin/time", "-f", "RATEFERRY_RSS_KB %M CPU_S %U %S"] + cmd if timer else cmd
    t0 = time.perf_counter()
    proc = subprocess.run(full, env=env, capture_output=True, text=True)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"{cmd[:3]} failed ({proc.returncode}): {proc.stderr[-2000:]}")
    if timer:
        line = [ln for ln in proc.stderr.splitlines() if ln.startswith("RATEFERRY_RSS_KB")][-1]
        _, kb, _, user, system = line.split()
        rss_mb, cpu = int(kb) / 1024.0, float(user) + float(system)
    else:
        usage = resource.getrusage(resource.RUSAGE_CHILDREN)
        rss_mb, cpu = usage.ru_maxrss / 1024.0, float("nan")
    return dict(seconds=seconds, peak_rss_mb=rss_mb, cpu_s=cpu)


def bench_pipeline(minutes=2.0, *, keep_dir=None, dither="tpdf"):
    py = sys.executable
    with tempfile.TemporaryDirectory(dir=keep_dir) as tmp:
        src = os.path.join(tmp, "speech.flac")
        make_source(src, minutes)
        floor = _measure([py, "-c", _IO_FLOOR, src, os.path.join(tmp, "floor.flac")])
        ours = _measure([py, "-c", _RATEFERRY, "convert", src, os.path.join(tmp, "ours.flac"),
                         "--to", str(RATE_OUT), "--bits", "16", "--dither", dither, "--quiet"])
        plain = _measure([py, "-c", _PLAIN_SCIPY, src, os.path.join(tmp, "plain.flac")])
    audio_s = minutes * 60
    for r in (floor, ours, plain):
        r["x_realtime"] = audio_s / r["seconds"]
    return dict(minutes=minutes, io_floor=floor, rateferry_convert=ours, plain_scipy=plain,
                rateferry_over_floor=ours["seconds"] / floor["seconds"],
                plain_over_rateferry=plain["seconds"] / ours["seconds"],
                load_average=list(os.getloadavg()))


def memory_vs_duration(minutes_list, dither="tpdf"):
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for m in minutes_list:
            src = os.path.join(tmp, f"src_{m}.flac")
            make_source(src, m)
            r = _measure([sys.executable, "-c", _RATEFERRY, "convert", src,
                          os.path.join(tmp, f"out_{m}.flac"), "--to", str(RATE_OUT),
                          "--bits", "16", "--dither", dither, "--quiet"])
            rows.append(dict(minutes=m, **r))
            os.remove(src)
    return rows


def stage_seconds(minutes, dither="tpdf"):
    """CPU seconds of each thread of one ``rateferry convert`` run in this process: the stages
    (:class:`webapp.threads.Background`), the reader (:func:`webapp.threads.prefetch`) and the
    main thread (the converter). Timed with ``time.thread_time`` around each item."""
    import collections
    from webapp import pipeline, threads
    from webapp.cli import main as cli_main
    cpu = collections.defaultdict(float)
    plain_run, plain_prefetch = threads.Background._run, pipeline.prefetch

    def timed_run(stage):
        t = time.thread_time()
        try:
            plain_run(stage)
        finally:
            cpu[stage._thread.name] += time.thread_time() - t

    def timed_prefetch(blocks, depth=3):
        def reading():
            t = time.thread_time()
            try:
                yield from blocks
            finally:
                cpu["rateferry-reader"] += time.thread_time() - t
        return plain_prefetch(reading(), depth=depth)

    threads.Background._run, pipeline.prefetch = timed_run, timed_prefetch
    try:
        with tempfile.TemporaryDirectory() as tmp:
            src = os.path.join(tmp, "speech.flac")
            make_source(src, minutes)
            t0, c0, m0 = time.perf_counter(), time.process_time(), time.thread_time()
            cli_main(["convert", src, os.path.join(tmp, "out.flac"), "--to", str(RATE_OUT),
                      "--bits", "16", "--dither", dither, "--silent"])
            wall, total = time.perf_counter() - t0, time.process_time() - c0
            cpu["main thread (converter)"] = time.thread_time() - m0
    finally:
        threads.Background._run, pipeline.prefetch = plain_run, plain_prefetch
    rows = [dict(name=name, value=round(v, 3), unit="CPU s") for name, v in
            sorted(cpu.items(), key=lambda kv: -kv[1])]
    return dict(title=f"rateferry convert, {minutes:g} min: CPU seconds per thread "
                      f"(wall {wall:.2f} s, CPU {total:.2f} s, load {os.getloadavg()[0]:.2f})",
                figures=rows)


def figures(p):
    floor, ours, plain = p["io_floor"], p["rateferry_convert"], p["plain_scipy"]
    ref = "I/O floor (FLAC decode + encode)"
    return [
        dict(name="I/O floor", value=floor["seconds"], unit="s"),
        dict(name="rateferry convert", value=ours["seconds"], unit="s", reference=ref,
             reference_value=floor["seconds"], ratio=round(p["rateferry_over_floor"], 2),
             target="<= 1.3x the floor"),
        dict(name="plain scipy", value=plain["seconds"], unit="s", reference="rateferry convert",
             reference_value=ours["seconds"], ratio=round(p["plain_over_rateferry"], 2)),
        dict(name="I/O floor peak RSS", value=floor["peak_rss_mb"], unit="MB"),
        dict(name="rateferry peak RSS", value=ours["peak_rss_mb"], unit="MB", reference=ref,
             reference_value=floor["peak_rss_mb"], target="< 200 MB, flat with duration"),
        dict(name="plain scipy peak RSS", value=plain["peak_rss_mb"], unit="MB",
             reference="rateferry convert", reference_value=ours["peak_rss_mb"]),
    ]


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python benchmarks/bench_pipeline.py",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=2.0, help="source duration, default 2")
    ap.add_argument("--memory", type=float, nargs="*", default=None,
                    help="durations in minutes for rateferry's peak RSS against duration")
    ap.add_argument("--tmp", default=None, help="folder for the temporary files")
    ap.add_argument("--json", action="store_true", help="print the result as JSON")
    ap.add_argument("--dither", choices=("tpdf", "shaped"), default="tpdf",
                    help="rateferry's dither (plain scipy always adds TPDF), default tpdf")
    ap.add_argument("--stages", action="store_true",
                    help="CPU seconds of each pipeline thread, one in-process run")
    args = ap.parse_args(argv)
    if args.stages:
        return stage_seconds(args.minutes, args.dither)
    if args.memory:
        return dict(title="rateferry convert: peak RSS against duration",
                    memory=memory_vs_duration(args.memory, args.dither))
    p = bench_pipeline(args.minutes, keep_dir=args.tmp, dither=args.dither)
    title = (f"{args.minutes:g} min speech-like stereo 44.1 kHz 16-bit FLAC -> 48 kHz 16-bit "
             f"FLAC, rateferry with {args.dither} dither (plain scipy TPDF); each in its own process")
    return dict(title=title, figures=figures(p), **p)


def print_table(result):
    print(result["title"])
    if "io_floor" not in result and "memory" not in result:
        for r in result["figures"]:
            print(f"  {r['name']:36s} {r['value']:7.2f} {r['unit']}")
        return
    if "memory" in result:
        for r in result["memory"]:
            print(f"{r['minutes']:6g} min: {r['seconds']:7.1f} s, peak RSS {r['peak_rss_mb']:.1f} MB")
        return
    print(f"{'what':<34} {'seconds':>8} {'x real':>7} {'CPU s':>7} {'peak RSS':>10}")
    for key, label in (("io_floor", "FLAC decode + encode (I/O floor)"),
                       ("rateferry_convert", "rateferry convert --quiet"),
                       ("plain_scipy", "plain scipy, 120 dB Kaiser")):
        r = result[key]
        print(f"{label:<34} {r['seconds']:8.2f} {r['x_realtime']:7.0f} {r['cpu_s']:7.2f} "
              f"{r['peak_rss_mb']:7.0f} MB")
    print(f"rateferry / floor: {result['rateferry_over_floor']:.2f}x (target <= 1.3x); "
          f"plain scipy / rateferry: {result['plain_over_rateferry']:.2f}x")
    print("load average (1, 5, 15 min): " + ", ".join(f"{v:.2f}" for v in result["load_average"]))


if __name__ == "__main__":
    res = main(sys.argv[1:])
    if "--json" in sys.argv[1:]:
        print(json.dumps(res, indent=2))
    else:
        print_table(res)
