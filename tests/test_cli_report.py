"""The command line as a daily tool: the convert report's documented shape (validated with the
jsonschema library against webapp/schemas/convert-report.schema.json), numbers rounded to what
they mean, `plans` naming the plan used, --quiet and --silent on every command, progress from
tqdm on a terminal and one summary line otherwise.

Outside checks: output length ceil(frames * up / down) (the converter's alignment rule, the rational
conversion's definition); the plan `plans` names is webapp.dsp.stages.choose_plan's, the one
function that decides (compared, not recomputed); a sine of amplitude 0.5 peaks at
20 log10(0.5) = -6.02 dBFS (physics).
"""

import io
import json
import math
import os
from dataclasses import replace

import jsonschema
import numpy as np
import pytest
import soundfile as sf

from webapp.cli import Progress, build_parser, main
from webapp.dsp.spec import preset
from webapp.dsp.stages import choose_plan

SCHEMA = os.path.join(os.path.dirname(__file__), os.pardir, "webapp", "schemas",
                      "convert-report.schema.json")


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def source(tmp_path):
    t = np.arange(44100) / 44100
    path = tmp_path / "in.wav"
    sf.write(path, np.column_stack([0.5 * np.sin(2 * np.pi * 1000 * t)] * 2), 44100,
             subtype="PCM_24")
    return path


def _keys(value, prefix=""):
    if isinstance(value, dict):
        for k, v in value.items():
            yield f"{prefix}.{k}" if prefix else k
            if k != "stages":
                yield from _keys(v, f"{prefix}.{k}" if prefix else k)


def test_convert_json_follows_its_schema_with_each_figure_once(capsys, source, tmp_path):
    code, out, err = run(capsys, "convert", source, tmp_path / "o.flac", "--to", 48000,
                         "--ceiling", -1, "--json")
    assert code == 0, err
    report = json.loads(out)
    jsonschema.validate(report, json.load(open(SCHEMA)))
    assert set(report) == {"version", "source", "design", "output", "delivery", "timing"}
    leaves = [k.rsplit(".", 1)[-1] for k in _keys(report)]
    for name in ("clipped_samples", "bits", "gain_db", "seconds", "fs_in", "fs_out"):
        assert leaves.count(name) <= 1, name
    assert report["delivery"]["bits"] == "16"          # the spoken-word preset's word length
    assert sf.info(tmp_path / "o.flac").subtype == "PCM_16"
    assert report["output"]["frames"] == math.ceil(44100 * 160 / 147)
    # rounded to what the figures mean: levels to 0.01 dB, gain to 0.0001 dB
    for side in ("source", "output"):
        v = report[side]["true_peak_dbtp"]
        assert v == round(v, 2)
    assert report["source"]["sample_peak_dbfs"] == pytest.approx(20 * math.log10(0.5), abs=0.01)
    assert report["delivery"]["gain_db"] == round(report["delivery"]["gain_db"], 4)
    # the schema refuses the old flat shape
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(dict(report, clipped_samples=0), json.load(open(SCHEMA)))


def test_convert_text_is_rounded_and_the_wrote_line_survives_quiet(capsys, source, tmp_path):
    code, out, err = run(capsys, "convert", source, tmp_path / "o.wav", "--to", 48000,
                         "--ceiling", -1, "--bits", 24)
    assert code == 0, err
    wrote = out.splitlines()[0]
    assert wrote.startswith(f"wrote {tmp_path / 'o.wav'}: 48 000 frames at 48000 Hz")
    peak = wrote.split("true peak ")[1].split(" dBTP")[0]
    assert len(peak.split(".")[1]) == 1                 # -6.0, not -6.0206...
    assert "100.0 %" in err and "frames/s" in err       # not a terminal: one summary line
    assert err.count("\n") == 1
    code, out, err = run(capsys, "convert", source, tmp_path / "q.wav", "--to", 48000, "--quiet")
    assert out.startswith("wrote ") and out.count("\n") == 1 and err == ""


def test_plans_says_which_plan_is_used_in_plain_words(capsys):
    code, out, _ = run(capsys, "plans", "--from", 192000, "--to", 8000)
    assert code == 0
    assert "True" not in out and "False" not in out
    assert "meets the mask: yes" in out
    auto = choose_plan(replace(preset("spoken_word_delivery"), stages="auto"), 192000, 8000)
    assert out.splitlines()[-1] == (f"used with --stages single: single stage "
                                    f"(--stages auto would use {auto.label})")
    code, out, _ = run(capsys, "plans", "--from", 192000, "--to", 8000, "--stages", "auto",
                       "--json")
    d = json.loads(out)
    assert d["used"] == d["auto_uses"] == auto.label and d["stages"] == "auto"


@pytest.mark.parametrize("command", ["design", "plans", "convert", "audit", "serve", "clean"])
def test_every_command_takes_quiet_and_silent(command):
    extra = {"design": ["--from", "44100", "--to", "48000"],
             "plans": ["--from", "44100", "--to", "48000"],
             "audit": ["--from", "44100", "--to", "48000"],
             "convert": ["a.wav", "b.wav", "--to", "48000"]}.get(command, [])
    for flag in ("--quiet", "--silent"):
        args = build_parser().parse_args([command, *extra, flag])
        assert getattr(args, flag[2:]) is True


def test_design_and_clean_quiet_keep_one_result_line(capsys, tmp_path):
    code, out, _ = run(capsys, "design", "--from", 44100, "--to", 48000, "--quiet")
    assert code == 0 and out == "44100 -> 48000 Hz meets the mask: yes\n"
    code, out, _ = run(capsys, "design", "--from", 44100, "--to", 48000, "--silent")
    assert code == 0 and out == ""
    code, out, _ = run(capsys, "clean", "--instance", tmp_path, "--days", 7, "--quiet")
    assert code == 0 and out == "removed 0 old files\n"


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_progress_draws_a_bar_with_rate_and_eta_on_a_terminal():
    stream = _Terminal()
    bar = Progress("in.wav", enabled=True, stream=stream)
    for done in range(0, 100001, 10000):
        bar(done / 100000, done, 100000)
    bar.close()
    text = stream.getvalue()
    assert "in.wav" in text and "frame/s" in text and "<" in text   # rate and time left
    plain = io.StringIO()
    bar = Progress("in.wav", enabled=True, stream=plain)
    bar(0.5, 50, 100)
    bar(1.0, 100, 100)
    bar.close()
    assert plain.getvalue().startswith("in.wav: 100.0 % of 100 frames read in ")
    assert plain.getvalue().count("\n") == 1
