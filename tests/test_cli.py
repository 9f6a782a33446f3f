"""The `rateferry` command's stable contract: JSON keys, exit codes, nothing written on error.

Checks against outside references: output length ceil(frames * up / down) (rational conversion
definition); a converted analytic sine equals the sine sampled at the new rate within the
spec's ripple (physics); float input stays float (soundfile subtype).
"""

import json

import pytest

from webapp.cli import main


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_design_json_has_the_contract_keys(capsys):
    code, out, _ = run(capsys, "design", "--from", "44100", "--to", "48000", "--preset",
                       "music_delivery", "--json")
    assert code == 0
    d = json.loads(out)
    for key in ("up", "down", "numtaps", "method", "meets_mask", "measured",
                "macs_per_output_sample", "latency_ms"):
        assert key in d
    assert (d["up"], d["down"]) == (160, 147)
    assert d["meets_mask"] is True
    assert d["measured"]["stopband_attenuation_db"] >= 120.0
    assert d["measured"]["passband_ripple_db"] <= 0.01


def test_design_options_override_the_preset(capsys):
    code, out, _ = run(capsys, "design", "--from", "48000", "--to", "16000", "--preset",
                       "spoken_word_delivery", "--attenuation", "80", "--phase", "minimum",
                       "--json")
    d = json.loads(out)
    assert code == 0 and d["spec"]["attenuation_db"] == 80.0 and d["phase"] == "minimum"
    assert d["spec"]["ripple_db"] == 0.05      # from the preset


@pytest.mark.parametrize("argv, rule", [
    (["design", "--from", "0", "--to", "48000"], "--from must be an integer from 1000"),
    (["design", "--from", "44100", "--to", "-5"], "--to must be an integer from 1000"),
    (["design", "--from", "48000", "--to", "44100", "--passband", "30000"],
     "passband_hz must be above 0 and below the lower Nyquist"),
    (["design", "--from", "48000", "--to", "44100", "--method", "equiripple"],
     "method equiripple is limited to"),
    (["design", "--from", "48000", "--to", "44100", "--attenuation", "140", "--arithmetic",
      "float32"], "needs arithmetic float64"),
])
def test_bad_design_input_is_one_line_and_exit_2(capsys, argv, rule):
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert err.startswith("rateferry: error: ") and rule in err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_plans_lists_cheaper_multistage_plans(capsys):
    code, out, _ = run(capsys, "plans", "--from", "192000", "--to", "8000", "--json")
    d = json.loads(out)
    assert code == 0 and d["plans"]
    assert d["plans"][0]["macs_per_output_sample"] < d["single"]["macs_per_output_sample"] / 5


def test_audit_json_has_the_contract_keys_and_measures_the_mask(capsys):
    code, out, _ = run(capsys, "audit", "--from", "48000", "--to", "16000", "--attenuation",
                       "100", "--ripple", "0.05", "--json")
    d = json.loads(out)
    assert code == 0
    for key in ("passband_deviation_db", "worst_alias_db", "thd_n_db", "noise_floor_dbfs",
                "group_delay_ms", "verdict"):
        assert key in d
    assert d["worst_alias_db"] <= -100.0 and abs(d["passband_deviation_db"]) <= 0.05
    # a linear-phase design delays by (numtaps - 1) / 2 samples at the filter rate
    code, out, _ = run(capsys, "design", "--from", "48000", "--to", "16000", "--attenuation",
                       "100", "--ripple", "0.05", "--json")
    design = json.loads(out)
    assert d["group_delay_ms"] == pytest.approx(design["latency_ms"], rel=1e-3)
