"""`rateferry batch` on a real Dask scheduler with worker processes (see conftest.py).

The reference for every output is `rateferry convert` of the same file with the same options:
batch must run the same job model, so the bytes are the same (sha256 and byte comparison). The
restart and worker-loss checks follow Dask's documented behaviour: the scheduler reruns the
tasks of a lost worker elsewhere (distributed docs, "Resilience").
"""

import csv
import hashlib
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time

import pytest

from webapp.batch.cluster import check_paths
from webapp.batch.ledger import LEDGER_NAME
from webapp.dsp.errors import ParameterError

from .conftest import CORRUPT, SOURCES, env, events, run_batch_cli, start_worker

pytestmark = pytest.mark.timeout(240)


def outputs(folder):
    return {p.name: p.read_bytes() for p in folder.iterdir()
            if p.suffix in (".wav", ".flac") and not p.name.startswith(".")}


def report_rows(folder):
    with open(folder / "batch-report.csv", newline="") as f:
        return {r["output"]: r for r in csv.DictReader(f)}


@pytest.fixture(scope="module")
def first_run(dask_cluster, sources, references, tmp_path_factory):
    address, _, _ = dask_cluster
    out = tmp_path_factory.mktemp("on_scheduler")
    proc = run_batch_cli([sources], out, "--scheduler", address, "--json")
    return out, proc


def test_every_output_equals_convert_byte_for_byte(first_run, references):
    out, proc = first_run
    refs, _ = references
    assert proc.returncode == 4, proc.stderr          # one corrupt file: "some failed"
    got = outputs(out)
    assert sorted(got) == sorted(refs) and len(got) == len(SOURCES) == 12
    for name, data in refs.items():
        assert got[name] == data, name
    rows = report_rows(out)
    for name, data in refs.items():
        assert rows[name]["state"] == "done"
        assert rows[name]["output_sha256"] == hashlib.sha256(data).hexdigest()
    # mixed routes: 22.05, 44.1, 48 and 96 kHz to 16 kHz, one shared design each
    assert {r["fs_in"] for r in rows.values() if r["fs_in"]} == {"22050", "44100", "48000",
                                                                  "96000"}
    assert not [p for p in os.listdir(out) if ".partial" in p]


def test_the_batch_sheet_holds_each_shared_design_and_every_file_offline(first_run):
    out, _ = first_run
    text = (out / "batch-sheet.html").read_text(encoding="utf-8")
    assert "default-src 'none'" in text                     # nothing may load from elsewhere
    # plotly.js is inlined whole (its own text holds URLs); the rest of the page holds none
    rest = re.sub(r'<script id="rf-plotly">.*?</script>', "", text, flags=re.S)
    assert len(rest) < len(text) - 1_000_000
    assert "http://" not in rest and "https://" not in rest
    for rate in (22050, 44100, 48000, 96000):              # one design per route
        assert f"{rate} Hz &rarr; 16000 Hz" in text
    assert len(re.findall(r'data-plot="r\d-response"', text)) == 4
    assert text.count('<tr class="done">') == 12 and text.count('<tr class="failed">') == 1


def test_corrupt_file_is_reported_with_converts_own_line(first_run, references):
    out, proc = first_run
    _, convert_error = references
    assert convert_error.startswith("rateferry: error: cannot read 'damaged_take.wav'")
    assert convert_error in proc.stderr.splitlines()
    row = [r for r in report_rows(out).values() if r["source"].endswith(CORRUPT)][0]
    assert row["state"] == "failed"
    assert "rateferry: error: " + row["message"] == convert_error
    ev = events(proc.stdout)
    assert ev[0]["event"] == "start" and ev[0]["files"] == 13 and ev[0]["to_convert"] == 12
    assert ev[-1]["event"] == "end" and ev[-1]["counts"] == {"done": 12, "skipped": 0,
                                                             "failed": 1}
    assert ev[-1]["exit_code"] == 4


def test_a_second_run_does_no_work(first_run, sources, dask_cluster):
    out, _ = first_run
    address = dask_cluster[0]
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir() if p.suffix == ".wav"}
    proc = run_batch_cli([sources], out, "--scheduler", address, "--json")
    assert proc.returncode == 4
    ev = events(proc.stdout)
    assert ev[0]["to_convert"] == 0 and ev[0]["already_done"] == 12
    assert ev[-1]["counts"] == {"done": 0, "skipped": 12, "failed": 1}
    after = {p.name: p.stat().st_mtime_ns for p in out.iterdir() if p.suffix == ".wav"}
    assert after == before
    with sqlite3.connect(out / LEDGER_NAME) as db:
        states = dict(db.execute("SELECT state, COUNT(*) FROM files GROUP BY state"))
        runs = db.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
    assert states == {"done": 12, "failed": 1} and runs == 2


def test_embedded_cluster_and_scheduler_give_identical_outputs(first_run, sources,
                                                               tmp_path):
    out, _ = first_run
    proc = run_batch_cli([sources], tmp_path, "--workers", "2", "--quiet")
    assert proc.returncode == 4, proc.stderr
    assert outputs(tmp_path) == outputs(out)


def test_a_worker_killed_during_the_batch_loses_nothing(dask_cluster, sources, references,
                                                         tmp_path):
    address, sfile, client = dask_cluster
    refs, _ = references
    victim = start_worker(sfile, "victim")
    try:
        client.wait_for_workers(3, timeout=60)
        victim_addr = [a for a, w in client.scheduler_info()["workers"].items()
                       if w.get("name") == "victim"][0]
        batch = subprocess.Popen(
            [sys.executable, "-m", "webapp.cli", "batch", str(sources), "--out", str(tmp_path),
             "--scheduler", address, "--quiet", "--to", "16000", "--preset",
             "spoken_word_delivery", "--bits", "16", "--ceiling", "-1"],
            env=env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 120
        killed = False
        while time.monotonic() < deadline and batch.poll() is None:
            if client.processing(workers=[victim_addr]).get(victim_addr):
                victim.send_signal(signal.SIGKILL)     # mid-task: no clean shutdown
                killed = True
                break
            time.sleep(0.005)
        assert killed, "the victim worker never got a file"
        _, err = batch.communicate(timeout=180)
    finally:
        if victim.poll() is None:
            victim.kill()
        victim.wait()
    assert batch.returncode == 4, err
    assert outputs(tmp_path) == refs, err[-3000:]
    assert not [p for p in os.listdir(tmp_path) if ".partial" in p]
    rows = report_rows(tmp_path)
    assert sum(r["state"] == "done" for r in rows.values()) == 12
    assert victim_addr not in client.scheduler_info()["workers"]   # it really was lost


def test_every_worker_is_probed_for_the_paths(dask_cluster, tmp_path):
    client = dask_cluster[2]
    missing = str(tmp_path / "not_here.wav")
    with pytest.raises(ParameterError, match=r"Dask worker tcp://127\.0\.0\.1:\d+ cannot see "
                       + "'" + missing.replace(".", r"\.") + "'"):
        check_paths(client, [missing], str(tmp_path))
    assert len(check_paths(client, [], str(tmp_path))) >= 2
