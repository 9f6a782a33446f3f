"""Numbers on the command line: one rule (webapp.dsp.numbers), one line, exit code 2.

Regression tests for the hardening findings: a 400-digit ``--to`` ended in a traceback with exit
code 1; ``--to nan`` and ``--to 44100.5`` printed the whole usage block. The run in a real
process checks what a user sees (stderr, exit code), not only what main() returns.
"""

import os
import subprocess
import sys

import numpy as np
import pytest

from webapp.cli import main
from webapp.dsp.errors import ParameterError
from webapp.dsp.numbers import finite_number, whole_number

HUGE = "1" + "0" * 399   # a 400-digit integer: float() of it raises OverflowError


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("value, rule", [
    ("44100.5", "--to must be an integer from 1000 to 768000 Hz, got 44100.5"),
    ("nan", "--to must be an integer from 1000 to 768000 Hz (a finite number), got nan"),
    ("inf", "(a finite number), got inf"),
    ("-inf", "(a finite number), got -inf"),
    ("1e999", "(a finite number), got inf"),
    (HUGE, "--to must be an integer from 1000 to 768000 Hz, got a 400-digit integer"),
    ("-" + HUGE, "got a -400-digit integer"),
    ("48k", "--to must be an integer from 1000 to 768000 Hz, got '48k'"),
    ("0", "got 0"),
])
def test_bad_rate_is_one_line_naming_the_rule(capsys, value, rule):
    code, out, err = run(capsys, "design", "--from", "44100", f"--to={value}")
    assert code == 2 and out == ""
    assert err.startswith("rateferry: error: ") and rule in err, err
    assert err.count("\n") == 1 and "usage:" not in err and "Traceback" not in err


@pytest.mark.parametrize("argv, rule", [
    (["--attenuation", HUGE], "--attenuation must be a number of dB (a finite number), got a "
                              "400-digit integer"),
    (["--attenuation", "nan"], "--attenuation must be a number of dB (a finite number), got nan"),
    (["--ripple", "1e999"], "--ripple must be a number of dB (a finite number), got inf"),
    (["--passband", "inf"], "--passband must be a number of Hz (a finite number), got inf"),
    (["--passband-fraction", "x"], "--passband-fraction must be a number, got 'x'"),
    (["--stopband=-" + HUGE], "--stopband must be a number of Hz (a finite number), got a "
                                 "-400-digit integer"),
])
def test_bad_spec_numbers_are_one_line(capsys, argv, rule):
    code, _, err = run(capsys, "design", "--from", "44100", "--to", "48000", *argv)
    assert code == 2 and rule in err and err.count("\n") == 1, err


@pytest.mark.parametrize("argv, rule", [
    (["--ceiling", "1e999"], "--ceiling must be a number from -60 to 0 dBTP (a finite number)"),
    (["--ceiling", "3"], "--ceiling must be a number from -60 to 0 dBTP, got 3"),
    (["--loudness", HUGE], "--loudness must be a number from -70 to 0 LUFS, got a 400-digit"),
    (["--seed", "-1"], "--seed must be a whole number from 0 to 9.22337e+18, got -1"),
    (["--seed", "1.5"], "--seed must be a whole number from 0 to 9.22337e+18, got 1.5"),
    (["--block-frames", "0"], "--block-frames must be a whole number from 1 to 1.67772e+07"),
])
def test_bad_convert_numbers_are_one_line_and_write_nothing(capsys, tmp_path, argv, rule):
    source = tmp_path / "in.wav"
    import soundfile as sf
    sf.write(source, np.zeros((4410, 1)), 44100, subtype="PCM_16")
    before = sorted(os.listdir(tmp_path))
    code, _, err = run(capsys, "convert", source, tmp_path / "out.wav", "--to", "48000", *argv)
    assert code == 2 and rule in err and err.count("\n") == 1, err
    assert sorted(os.listdir(tmp_path)) == before


def test_clean_days_refuses_infinity(capsys, tmp_path):
    code, _, err = run(capsys, "clean", "--instance", tmp_path, "--days", "inf")
    assert code == 2
    assert "--days must be a number from 0 to 36500 days (a finite number), got inf" in err


def test_serve_port_out_of_range_is_one_line(capsys):
    code, _, err = run(capsys, "serve", "--port", HUGE, "--no-browser")
    assert code == 2 and "--port must be a whole number from 1 to 65535, got a 400-digit" in err


def test_a_real_process_prints_one_line_and_exits_2():
    env = dict(os.environ, PYTHONPATH=os.getcwd() + os.pathsep + os.environ.get("PYTHONPATH", ""))
    for value in (HUGE, "nan", "44100.5"):
        proc = subprocess.run([sys.executable, "-c", "import sys; from webapp.cli import main; "
                               "sys.exit(main())", "design", "--from", "44100", "--to", value],
                              capture_output=True, text=True, env=env, timeout=120)
        assert proc.returncode == 2, proc.stderr
        assert proc.stdout == ""
        assert proc.stderr.startswith("rateferry: error: --to must be an integer from 1000 to "
                                      "768000 Hz") and proc.stderr.count("\n") == 1


# the shared rule itself ------------------------------------------------------------------------

@pytest.mark.parametrize("value", [float("inf"), float("-inf"), float("nan"), 10**400,
                                   -(10**400), True, None, "1", [1]])
def test_finite_number_refuses_what_is_not_a_finite_number(value):
    with pytest.raises(ParameterError, match=r"^gain_db must be a number") as info:
        finite_number(value, "gain_db")
    assert info.value.field == "gain_db"


def test_finite_number_reads_text_only_when_asked():
    assert finite_number("-1.5", "x", text=True) == -1.5
    assert finite_number(10**20, "x") == 1e20          # a big but finite integer is fine
    with pytest.raises(ParameterError, match="got a 400-digit integer"):
        finite_number(10**399, "x", low=0, high=10)    # compared as int: no OverflowError


def test_whole_number_takes_whole_floats_and_refuses_fractions():
    assert whole_number(48000.0, "fs_out") == 48000
    assert isinstance(whole_number(48000.0, "fs_out"), int)
    with pytest.raises(ParameterError, match="got 44100.5"):
        whole_number(44100.5, "fs_out")
    with pytest.raises(ParameterError, match=r"from 1 to 10, got 11"):
        whole_number("11", "n", low=1, high=10, text=True)
