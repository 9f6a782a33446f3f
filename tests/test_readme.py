"""The README's command examples run as written: every indented command block's `rateferry`
lines run in order in a temporary working folder, against files generated there (the only thing
the test provides: the inputs the examples name and the working folder, with the instance
folder pointed into it through RATEFERRY_INSTANCE). `serve` is started, answers
/api/health, and is stopped. The one example that names a Dask scheduler on another machine
(`--scheduler tcp://...`) is not run: no such machine exists here.

Outside check: each example ends with exit status 0 and the files it names exist; a written
output holds ceil(frames * up / down) frames (the rational conversion's definition).
"""

import json
import math
import os
import re
import shlex
import shutil
import subprocess
import sys
import time
import urllib.request

import numpy as np
import soundfile as sf

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def readme_commands():
    """`rateferry ...` lines of the README's indented (4-space) code blocks, in order."""
    text = open(os.path.join(ROOT, "README.md"), encoding="utf-8").read()
    lines = []
    for line in text.splitlines():
        if re.match(r"^    rateferry\b", line) and "--scheduler" not in line:
            lines.append(shlex.split(line.strip(), comments=True))
    return lines


def _program():
    exe = shutil.which("rateferry")
    return [exe] if exe else [sys.executable, "-m", "webapp.cli"]


def _inputs(folder):
    """The files the examples name, generated: speech-band and music-band test tones."""
    rng = np.random.default_rng(20261201)
    t = np.arange(3 * 44100) / 44100
    tone = 0.3 * np.sin(2 * np.pi * 440 * t) + 0.01 * rng.standard_normal(t.size)
    sf.write(folder / "interview.flac", tone, 44100, subtype="PCM_16")
    sf.write(folder / "in.wav", np.column_stack([tone, tone]), 44100, subtype="PCM_24")
    t48 = np.arange(2 * 48000) / 48000
    sf.write(folder / "master.wav", 0.5 * np.sin(2 * np.pi * 1000 * t48), 48000,
             subtype="PCM_24")
    # the batch examples: a folder, a manifest, an archive with a recipe made from one of its files
    for sub, names in (("season2", ("ep1.wav", "ep2.wav")), ("archive", ("ep12.wav", "ep13.wav"))):
        (folder / sub).mkdir()
        for name in names:
            sf.write(folder / sub / name, tone[:44100], 44100, subtype="PCM_16")
    (folder / "takes.csv").write_text("source\nseason2/ep1.wav\nseason2/ep2.wav\n")
    # the drift examples: one event on two recorders, the guest's clock +40 ppm fast and started
    # 0.35 s late (scipy.signal.resample_poly with the exact ratio 25001/25000)
    from scipy import signal
    fs = 16000
    n = 40 * fs
    voice = signal.lfilter([1.0], [1.0, -0.95], rng.standard_normal(n)) * 0.02
    voice *= (np.sin(2 * np.pi * 0.3 * np.arange(n) / fs) > -0.2)     # pauses between phrases
    guest = signal.resample_poly(voice, 25001, 25000)
    guest = np.concatenate([np.zeros(int(0.35 * fs)), guest])[:n]
    sf.write(folder / "call.wav", voice + 0.0005 * rng.standard_normal(n), fs, subtype="PCM_16")
    sf.write(folder / "guest.wav", 0.5 * guest + 0.0005 * rng.standard_normal(n), fs,
             subtype="PCM_16")
    (folder / "aligned").mkdir()
    from webapp import jobs
    from webapp.recipe import write_recipe
    result = jobs.convert_file(folder / "archive" / "ep12.wav", folder / "ep12_48k.wav",
                               fs_out=48000)
    write_recipe(result, folder / "ep12.recipe.json")


def _serve(argv, cwd, env):
    proc = subprocess.Popen(_program() + argv[1:], cwd=cwd, env=env, stderr=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True)
    try:
        line = proc.stderr.readline()          # the announcement, or a busy-port error
        assert "at http://" in line, line
        url = line.split(" at ", 1)[1].split(" ", 1)[0]
        deadline = time.monotonic() + 20
        while True:
            try:
                with urllib.request.urlopen(url + "api/health", timeout=2) as r:
                    assert json.loads(r.read())["status"] == "ok"
                    return
            except OSError:
                assert time.monotonic() < deadline, "serve did not answer"
                time.sleep(0.2)
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def test_readme_examples_run_as_written(tmp_path):
    commands = readme_commands()
    assert len(commands) >= 8
    _inputs(tmp_path)
    env = dict(os.environ, RATEFERRY_INSTANCE=str(tmp_path / "instance"),
               PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    for argv in commands:
        if argv[1] == "serve":
            _serve(argv, tmp_path, env)
            continue
        done = subprocess.run(_program() + argv[1:], cwd=tmp_path, env=env,
                              capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, (argv, done.stdout[-2000:], done.stderr[-2000:])
        if "--json" in argv and argv[1] != "batch":          # batch --json: JSON lines
            json.loads(done.stdout)
        elif "--json" in argv:
            [json.loads(line) for line in done.stdout.splitlines() if line.strip()]
        for flag in ("--write-recipe", "--sheet"):
            if flag in argv:
                assert (tmp_path / argv[argv.index(flag) + 1]).is_file(), (argv, flag)
    # the recipe example wrote its recipe, and the re-run reproduced the output
    assert (tmp_path / "interview_48k.recipe.json").is_file()
    assert sf.info(tmp_path / "again.flac").frames == math.ceil(3 * 44100 * 160 / 147)
    assert open(tmp_path / "again.flac", "rb").read() == \
        open(tmp_path / "interview_48k.flac", "rb").read()
