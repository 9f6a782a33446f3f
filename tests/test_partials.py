"""Partial files: never a lookalike of an output, and removed at the next start after kill -9.

Regression test for the hardening finding: kill -9 of `rateferry convert` left a hidden
``.NAME.HEX.partial.EXT`` beside the output (12 of 13 runs, up to 37 MB) that nothing removed.
The crash is real: a `rateferry convert` process killed with SIGKILL while it writes.
"""

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import soundfile as sf

from webapp import partials
from webapp.partials import PARTIAL_FOLDER


def _env():
    return dict(os.environ,
                PYTHONPATH=os.getcwd() + os.pathsep + os.environ.get("PYTHONPATH", ""))


def _cli(*argv):
    return [sys.executable, "-c", "import sys; from webapp.cli import main; sys.exit(main())",
            *map(str, argv)]


@pytest.fixture(scope="module")
def long_source(tmp_path_factory):
    """Two minutes of stereo noise at 44.1 kHz: long enough to be killed while writing."""
    path = tmp_path_factory.mktemp("src") / "session.wav"
    rng = np.random.default_rng(20261201)
    sf.write(path, 0.1 * rng.standard_normal((44100 * 120, 2)), 44100, subtype="PCM_16")
    return path


def _kill_while_writing(source, output):
    """Start a conversion, SIGKILL it once its partial file holds data; return the files of the
    partial folder at that moment."""
    proc = subprocess.Popen(_cli("convert", source, output, "--to", 48000, "--quiet"),
                            env=_env(), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    pfolder = os.path.join(os.path.dirname(output), PARTIAL_FOLDER)
    deadline = time.monotonic() + 120
    try:
        while time.monotonic() < deadline:
            found = [n for n in (os.listdir(pfolder) if os.path.isdir(pfolder) else [])
                     if n.endswith(".partial")]
            if found and os.path.getsize(os.path.join(pfolder, found[0])) > 0:
                os.kill(proc.pid, signal.SIGKILL)
                break
            if proc.poll() is not None:
                pytest.fail(f"the conversion ended before it could be killed: "
                            f"{proc.stderr.read().decode()}")
            time.sleep(0.005)
    finally:
        proc.kill()
        proc.wait(timeout=30)
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    return sorted(os.listdir(pfolder))


def test_kill_9_leaves_no_lookalike_and_the_next_run_removes_the_partial(tmp_path,
                                                                        long_source):
    out_folder = tmp_path / "delivery"
    out_folder.mkdir()
    output = out_folder / "session_48k.flac"
    left = _kill_while_writing(long_source, output)
    # what the crash left: one partial and the lock naming its (now dead) writer, inside the
    # hidden partial folder; nothing beside the output a user could take for a file of theirs
    assert len(left) == 2 and left[0].endswith(".flac.partial") and left[1].endswith(".lock")
    assert os.listdir(out_folder) == [PARTIAL_FOLDER]
    lock = json.loads((out_folder / PARTIAL_FOLDER / left[1]).read_text())
    assert isinstance(lock["pid"], int) and not partials.writer_alive(lock)

    # the next run of the command line, whatever it does and wherever it writes, sweeps it
    other = tmp_path / "instance"
    done = subprocess.run(_cli("clean", "--instance", other, "--days", 1), env=_env(),
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert os.listdir(out_folder) == []


def test_server_start_removes_partials_a_killed_writer_left_in_its_instance(tmp_path,
                                                                           long_source):
    from webapp.server import create_app
    instance = tmp_path / "instance"
    outputs = instance / "outputs"
    outputs.mkdir(parents=True)
    left = _kill_while_writing(long_source, outputs / "crashed.flac")
    assert len(left) == 2
    # forget the list the command line keeps, so only the server's own sweep can remove it
    os.unlink(partials.remembered_list_path())
    app = create_app({"TESTING": True, "LOAD_DEMO": False, "INSTANCE_PATH": str(instance)})
    try:
        assert not (outputs / PARTIAL_FOLDER).exists()
        assert sorted(os.listdir(outputs)) == []
    finally:
        app.extensions["rateferry"].shutdown()


def test_a_running_writers_partial_is_kept(tmp_path):
    target = tmp_path / "mix.wav"
    mine = partials.create(target, suffix=".wav")
    try:
        os.write(mine.fd, b"data")
        assert partials.sweep(tmp_path) == []
        assert os.path.exists(mine.path)
    finally:
        mine.discard()
    assert os.listdir(tmp_path) == []   # discard removes the file, the lock and the folder


def test_a_reused_pid_or_a_reboot_counts_as_a_dead_writer(tmp_path):
    pfolder = tmp_path / PARTIAL_FOLDER
    pfolder.mkdir()
    me = partials._owner()
    cases = {"reused": dict(me, started=(me["started"] or 0) + 1),
             "rebooted": dict(me, boot=(me["boot"] or 0) - 1000),
             "dead": dict(me, pid=2**22 + 1)}   # above Linux's default pid_max (2**22)
    for name, owner in cases.items():
        (pfolder / f"{name}.0123.wav.partial").write_bytes(b"x")
        (pfolder / f"{name}.0123.lock").write_text(json.dumps(owner))
    if me["started"] is None or me["boot"] is None:
        pytest.skip("no /proc: start and boot times are unknown here")
    removed = partials.sweep(tmp_path)
    assert sorted(os.path.basename(p) for p in removed) == [
        "dead.0123.wav.partial", "rebooted.0123.wav.partial", "reused.0123.wav.partial"]
    assert not pfolder.exists()


def test_a_partial_without_a_lock_is_removed_only_when_old(tmp_path):
    pfolder = tmp_path / PARTIAL_FOLDER
    pfolder.mkdir()
    fresh, old = pfolder / "a.1.wav.partial", pfolder / "b.2.wav.partial"
    fresh.write_bytes(b"x")
    old.write_bytes(b"x")
    hour_ago = time.time() - 3600
    os.utime(old, (hour_ago, hour_ago))
    assert [os.path.basename(p) for p in partials.sweep(tmp_path)] == ["b.2.wav.partial"]
    assert fresh.exists()
