"""A real Dask scheduler and two worker processes on 127.0.0.1, and a batch of generated files.

The scheduler and workers are the ``dask`` command's own processes (no mocks, no in-process
cluster); they inherit PYTHONPATH, so the workers import this checkout's ``webapp``. The
sources: 12 short files (WAV and FLAC, 22.05 / 44.1 / 48 / 96 kHz, mono and stereo) and one
corrupt file; the references are ``rateferry convert`` of each file with the same options.
"""

import contextlib
import io
import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import soundfile as sf

from webapp.batch.cluster import BLAS_ENV
from webapp.cli import main as cli_main

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
#: Options every batch test uses (convert takes the same ones).
OPTIONS = ["--to", "16000", "--preset", "spoken_word_delivery", "--bits", "16",
           "--ceiling", "-1"]
# rate, channels, extension, subtype, seconds
SOURCES = [
    (22050, 1, "wav", "PCM_16", 1.0), (22050, 2, "flac", "PCM_24", 1.5),
    (22050, 1, "flac", "PCM_16", 2.0), (44100, 2, "wav", "PCM_24", 1.0),
    (44100, 1, "flac", "PCM_16", 1.5), (44100, 2, "flac", "PCM_16", 2.0),
    (48000, 1, "wav", "FLOAT", 1.0), (48000, 2, "wav", "PCM_16", 1.5),
    (48000, 2, "flac", "PCM_24", 2.0), (96000, 1, "wav", "PCM_24", 1.0),
    (96000, 2, "flac", "PCM_24", 1.5), (96000, 1, "wav", "PCM_16", 2.0),
]
CORRUPT = "damaged_take.wav"


def env():
    e = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""),
             **BLAS_ENV)
    e.pop("RATEFERRY_SCHEDULER", None)
    return e


def start_worker(scheduler_file, name):
    return subprocess.Popen(
        [sys.executable, "-m", "dask", "worker", "--scheduler-file",
         scheduler_file, "--nthreads", "1", "--no-nanny", "--host", "127.0.0.1",
         "--no-dashboard", "--name", name],
        env=env(), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def stop(proc):
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture(scope="session")
def dask_cluster(tmp_path_factory):
    """(scheduler address, scheduler file, client) with two worker processes connected."""
    from distributed import Client
    folder = tmp_path_factory.mktemp("dask")
    sfile = str(folder / "scheduler.json")
    scheduler = subprocess.Popen(
        [sys.executable, "-m", "dask", "scheduler", "--host", "127.0.0.1",
         "--port", "0", "--no-dashboard", "--scheduler-file", sfile],
        env=env(), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    workers = []
    client = None
    try:
        deadline = time.monotonic() + 30
        while not os.path.exists(sfile) and time.monotonic() < deadline:
            time.sleep(0.05)
        assert os.path.exists(sfile), "the dask scheduler did not start"
        with open(sfile) as f:
            address = json.load(f)["address"]
        workers = [start_worker(sfile, f"w{i}") for i in range(2)]
        client = Client(address, timeout=30, set_as_default=False)
        client.wait_for_workers(2, timeout=60)
        yield address, sfile, client
    finally:
        if client is not None:
            client.close()
        for w in workers:
            stop(w)
        stop(scheduler)


def _signal(rate, channels, seconds, seed):
    """Two sines and a little noise, -12 dBFS peak: ordinary programme material."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(round(rate * seconds))) / rate
    x = np.empty((t.size, channels))
    for c in range(channels):
        x[:, c] = (0.15 * np.sin(2 * np.pi * (330 + 110 * c) * t)
                   + 0.08 * np.sin(2 * np.pi * 3100 * t + c)
                   + 0.01 * rng.standard_normal(t.size))
    return x


@pytest.fixture(scope="session")
def sources(tmp_path_factory):
    """The source folder: 12 good files and one corrupt one."""
    folder = tmp_path_factory.mktemp("sources")
    for i, (rate, ch, ext, subtype, seconds) in enumerate(SOURCES):
        sf.write(folder / f"take{i:02d}_{rate}_{ch}ch.{ext}", _signal(rate, ch, seconds, i),
                 rate, subtype=subtype)
    # a WAV header with no data chunk: libsndfile refuses it
    (folder / CORRUPT).write_bytes(b"RIFF\x24\x00\x00\x00WAVEfmt " + bytes(40))
    return folder


def convert_line(source, target, extra=()):
    """Run ``rateferry convert`` in this process; returns (exit code, stderr text)."""
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        code = cli_main(["convert", str(source), str(target), "--quiet", *OPTIONS, *extra])
    return code, err.getvalue()


@pytest.fixture(scope="session")
def references(sources, tmp_path_factory):
    """{output name: bytes} of ``rateferry convert`` per good source, and convert's error line
    for the corrupt one."""
    folder = tmp_path_factory.mktemp("references")
    refs = {}
    for path in sorted(sources.iterdir()):
        if path.name == CORRUPT:
            continue
        stem, ext = os.path.splitext(path.name)
        # the batch's default name: <stem>_16k_16bit<source format>
        name = f"{stem}_16k_16bit{ext}"
        code, err = convert_line(path, folder / name)
        assert code == 0, err
        refs[name] = (folder / name).read_bytes()
    code, err = convert_line(sources / CORRUPT, folder / "damaged.wav")
    assert code == 2
    return refs, err.strip()


def run_batch_cli(inputs, out, *extra, env_extra=None):
    """``rateferry batch`` as a subprocess; returns CompletedProcess (text)."""
    e = env()
    e.update(env_extra or {})
    return subprocess.run(
        [sys.executable, "-m", "webapp.cli", "batch", *map(str, inputs), "--out", str(out),
         *OPTIONS, *extra], env=e, capture_output=True, text=True, timeout=300)


def events(stdout):
    return [json.loads(line) for line in stdout.splitlines() if line.strip()]
