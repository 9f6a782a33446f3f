"""Batch throughput on the embedded Dask cluster: 1 worker against 2, and the per-file overhead.

The corpus: ``--files`` generated speech-band recordings of ``--seconds`` each (default 40 x
60 s), mono 16-bit WAV, alternating 44.1 and 48 kHz (two routes, so two shared designs), taken
to 16 kHz mono 16-bit with the spoken_word_delivery preset, as a speech service asks for. Each
cluster size converts the same corpus into its own folder (nothing skipped).

Figures, each beside its reference:

* throughput in audio hours per minute of wall time (conversions only: the cluster start and
  the client's preparation are reported apart);
* speed-up of 2 workers over 1 (target at least 1.8x on a 2-core machine);
* per-file overhead beyond conversion with 1 worker: (wall time of the conversions - the sum of
  the pipeline's own times) / files: scheduling, transfer, result handling, the ledger
  (target under 50 ms);
* the client's preparation per file (probe, output plan, ledger check), designs excluded.

    python benchmarks/bench_batch.py            # about 2 minutes on 2 cores
    python benchmarks/bench_batch.py --files 6 --seconds 5 --json
"""

import argparse
import json
import os
import sys
import tempfile
import time

import numpy as np
import soundfile as sf

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

SPEEDUP_TARGET = 1.8
OVERHEAD_TARGET_MS = 50.0


def make_corpus(folder, files, seconds, seed=7):
    """Speech-band test material (our own): a few formant-like tones in noise, per file."""
    rng = np.random.default_rng(seed)
    paths = []
    for i in range(files):
        rate = 44100 if i % 2 else 48000
        t = np.arange(int(rate * seconds)) / rate
        x = 0.02 * rng.standard_normal(t.size)
        for f0 in rng.uniform(120, 3400, size=4):
            x += 0.08 * np.sin(2 * np.pi * f0 * t + rng.uniform(0, 6.28))
        path = os.path.join(folder, f"talk{i:03d}_{rate}.wav")
        sf.write(path, x, rate, subtype="PCM_16")
        paths.append(path)
    return paths


def run_once(sources, out_dir, workers):
    from webapp.batch import BatchOptions, run_batch
    from webapp.batch.cluster import connect
    from webapp.batch.prepare import Settings
    from webapp.delivery import Delivery
    from webapp.dsp.spec import preset
    settings = Settings(out_dir=out_dir, fs_out=16000, spec=preset("spoken_word_delivery"),
                        delivery=Delivery(bits="16"))
    options = BatchOptions(inputs=tuple(sources), settings=settings, progress_line=False,
                           sheet=False)
    t0 = time.perf_counter()
    with connect(workers=workers) as (client, _):
        start_s = time.perf_counter() - t0
        outcome = run_batch(options, client=client)
    rows = outcome.rows
    assert all(r["state"] == "done" for r in rows), [r["message"] for r in rows]
    audio_s = sum(r["duration_s"] for r in rows)
    pipeline_s = sum(r["seconds"] for r in rows)
    convert_s = outcome.timings["convert_s"]
    task_s = sum(r["task_s"] for r in rows)
    return dict(workers=workers, files=len(rows), audio_hours=audio_s / 3600.0,
                cluster_start_s=start_s, prepare_s=outcome.timings["prepare_s"],
                convert_wall_s=convert_s, pipeline_sum_s=pipeline_s,
                audio_hours_per_minute=audio_s / 3600.0 / (convert_s / 60.0),
                x_realtime=audio_s / convert_s,
                overhead_per_file_ms=1000.0 * (convert_s * workers - pipeline_s) / len(rows),
                # of which inside the task (hashing the source, result figures) and outside it
                # (scheduling, transfer, the client's ledger and report rows)
                in_task_ms=1000.0 * (task_s - pipeline_s) / len(rows),
                dispatch_ms=1000.0 * (convert_s * workers - task_s) / len(rows))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--files", type=int, default=40)
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="rateferry-bench-batch-") as tmp:
        src = os.path.join(tmp, "src")
        os.mkdir(src)
        sources = make_corpus(src, args.files, args.seconds)
        runs = {n: run_once(sources, os.path.join(tmp, f"out{n}"), n) for n in (1, 2)}
    one, two = runs[1], runs[2]
    result = dict(
        load_average=os.getloadavg(), cores=os.cpu_count(), runs=[one, two],
        speedup=one["convert_wall_s"] / two["convert_wall_s"], speedup_target=SPEEDUP_TARGET,
        overhead_per_file_ms=one["overhead_per_file_ms"],
        overhead_target_ms=OVERHEAD_TARGET_MS,
        cpu_hours_per_audio_hour=one["pipeline_sum_s"] / (one["audio_hours"] * 3600.0),
    )
    # the sizing note: 10,000 audio hours to 16 kHz mono
    result["cpu_hours_for_10000_hours"] = 10000.0 * result["cpu_hours_per_audio_hour"]
    # rows for benchmarks/run.py: each figure beside its target
    result["figures"] = [
        dict(name="throughput, 1 worker", value=one["audio_hours_per_minute"],
             unit="audio h/min"),
        dict(name="throughput, 2 workers", value=two["audio_hours_per_minute"],
             unit="audio h/min"),
        dict(name="speed-up 2 workers / 1", value=result["speedup"], unit="x",
             target=f">= {SPEEDUP_TARGET}"),
        dict(name="overhead per file beyond conversion", value=result["overhead_per_file_ms"],
             unit="ms", target=f"< {OVERHEAD_TARGET_MS:g}"),
        dict(name="10,000 audio hours to 16 kHz mono", value=result["cpu_hours_for_10000_hours"],
             unit="CPU h"),
    ]
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        print(f"load average {result['load_average'][0]:.2f} on {result['cores']} cores")
        for r in (one, two):
            print(f"{r['workers']} worker(s): {r['files']} files, {r['audio_hours']:.3f} audio h "
                  f"in {r['convert_wall_s']:.2f} s = {r['audio_hours_per_minute']:.3f} audio h "
                  f"per minute ({r['x_realtime']:.0f}x real time); cluster start "
                  f"{r['cluster_start_s']:.2f} s, client preparation {r['prepare_s']:.2f} s "
                  "(designs included)")
        print(f"speed-up 2 workers / 1: {result['speedup']:.2f}x (target >= {SPEEDUP_TARGET}x)")
        print(f"overhead beyond conversion per file (1 worker): "
              f"{result['overhead_per_file_ms']:.1f} ms (target < {OVERHEAD_TARGET_MS:g} ms): "
              f"{one['in_task_ms']:.1f} ms in the task (source sha256, figures), "
              f"{one['dispatch_ms']:.1f} ms scheduling, transfer and the client's ledger")
        print(f"CPU time per audio hour: {result['cpu_hours_per_audio_hour'] * 3600:.1f} s; "
              f"10,000 audio hours to 16 kHz mono = "
              f"{result['cpu_hours_for_10000_hours']:.1f} CPU hours")
    return result


if __name__ == "__main__":
    main()
