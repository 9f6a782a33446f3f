"""Routes and masks.

Rational factors are plain arithmetic (gcd of the two rates): 44.1 -> 48 kHz is 160/147,
96 -> 44.1 kHz 147/320, 44.1 -> 16 kHz 160/441, 48 -> 8 kHz 1/6; 44100 = 2^2 3^2 5^2 7^2 and
48000 = 2^7 3 5^3.
"""

import pytest

from webapp.dsp.errors import ParameterError
from webapp.dsp.rates import route, validate_rate
from webapp.dsp.spec import DEFAULT_PRESET, PRESETS, Spec, preset, preset_bits, spec_from_dict


@pytest.mark.parametrize("fs_in, fs_out, up, down", [
    (44100, 48000, 160, 147), (48000, 44100, 147, 160), (24000, 96000, 4, 1),
    (44100, 22050, 1, 2), (96000, 44100, 147, 320), (44100, 16000, 160, 441),
    (48000, 8000, 1, 6), (32000, 48000, 3, 2), (44100, 44101, 44101, 44100),
])
def test_route_is_the_reduced_rational_factor(fs_in, fs_out, up, down):
    r = route(fs_in, fs_out)
    assert (r.up, r.down) == (up, down)
    assert fs_in * r.up == fs_out * r.down


def test_common_multiple_of_cd_and_video_rates():
    # 44100 = 2^2 3^2 5^2 7^2 and 48000 = 2^7 3 5^3: the common multiple is 7.056 MHz.
    assert route(44100, 48000).prototype_rate == 7_056_000


@pytest.mark.parametrize("bad", [0, -48000, 999, 768001, 44100.5, "fast", None, True, float("nan")])
def test_invalid_rates_name_the_rule_and_value(bad):
    with pytest.raises(ParameterError, match="integer from 1000 to 768000 Hz") as info:
        validate_rate(bad, field="fs_out")
    assert info.value.field == "fs_out"
    assert repr(bad) in str(info.value) or str(bad) in str(info.value)


def test_rate_strings_of_whole_numbers_are_accepted():
    assert validate_rate("48000") == 48000
    assert validate_rate(44100.0) == 44100


def test_mask_defaults_resolve_against_the_lower_nyquist():
    m = Spec().mask(route(48000, 44100))
    assert m.stopband_hz == 22050.0
    assert m.passband_hz == pytest.approx(0.9 * 22050.0)


def test_transition_aliasing_puts_the_stopband_at_lower_rate_minus_passband():
    m = Spec(passband_hz=20000.0, allow_transition_aliasing=True).mask(route(48000, 44100))
    assert m.stopband_hz == 44100 - 20000.0


def test_stopband_beyond_lower_rate_minus_passband_is_refused():
    with pytest.raises(ParameterError, match="at most lower rate - passband_hz") as info:
        Spec(passband_hz=20000.0, stopband_hz=25000.0).mask(route(48000, 44100))
    assert info.value.field == "stopband_hz"


def test_passband_above_nyquist_is_refused():
    with pytest.raises(ParameterError, match="below the lower Nyquist frequency 8000 Hz"):
        Spec(passband_hz=9000.0).mask(route(48000, 16000))


@pytest.mark.parametrize("field, value, rule", [
    ("ripple_db", 0.0, "ripple_db must be a number from"),
    ("attenuation_db", 500.0, "attenuation_db must be a number from 20 to 200 dB"),
    ("phase", "mixed", "phase must be one of linear, minimum"),
    ("method", "magic", "method must be one of auto, kaiser, equiripple, least-squares"),
])
def test_bad_spec_values_name_the_field(field, value, rule):
    with pytest.raises(ParameterError, match=rule) as info:
        Spec(**{field: value})
    assert info.value.field == field


def test_float32_refuses_masks_deeper_than_its_precision():
    with pytest.raises(ParameterError, match="needs arithmetic float64"):
        Spec(attenuation_db=140.0, arithmetic="float32")


def test_spec_from_dict_uses_field_names_and_refuses_unknown_keys():
    s = spec_from_dict({"attenuation_db": "110", "phase": "minimum", "passband_hz": None})
    assert s.attenuation_db == 110.0 and s.phase == "minimum" and s.passband_hz is None
    with pytest.raises(ParameterError, match="unknown spec field 'atten'"):
        spec_from_dict({"atten": 3})


def test_presets_are_plain_specs_and_pinned():
    # Pin the public defaults so they can't drift silently (values: common practice, see spec.py).
    assert set(PRESETS) == {"spoken_word_delivery", "music_delivery", "archival_master",
                            "live_voice_pipeline", "quick_preview"}
    music = preset("music_delivery")
    assert (music.ripple_db, music.attenuation_db, music.phase) == (0.01, 120.0, "linear")
    assert preset("archival_master").attenuation_db == 150.0
    assert preset("live_voice_pipeline").phase == "minimum"
    assert Spec() == Spec(passband_fraction=0.9, ripple_db=0.01, attenuation_db=120.0)
    # the page and the command line start on spoken word (the demo is an interview); a preset
    # that states a word length sets it
    assert DEFAULT_PRESET == "spoken_word_delivery"
    assert preset_bits("spoken_word_delivery") == "16" and preset_bits("archival_master") == "24"
    assert preset_bits("music_delivery") is None
    with pytest.raises(ParameterError, match="preset must be one of"):
        preset("loud")
