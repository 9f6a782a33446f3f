"""Delivery profiles and the Delivery fields they fill.

Sources named beside each check: EBU R 128 (v3.0, 2014), ATSC A/85 (2013), AES TD1004.1.15-10
(2015), as cited in webapp/profiles.py (confirmed or marked from memory there).
"""

import json

import pytest

from webapp.delivery import Delivery
from webapp.dsp.errors import ParameterError
from webapp.dsp.spec import PRESETS
from webapp.profiles import PROFILES, profile, profile_names


def test_published_targets_are_the_documents_values():
    # EBU R 128: -23 LUFS +-0.5 LU, -1 dBTP
    r128 = profile("broadcast_programme")
    assert (r128.loudness_lufs, r128.loudness_tolerance_lu, r128.ceiling_dbtp) == (-23.0, 0.5, -1.0)
    # ATSC A/85: -24 LKFS +-2 dB, -2 dBTP (the ceiling from memory)
    a85 = profile("us_broadcast")
    assert (a85.loudness_lufs, a85.loudness_tolerance_lu, a85.ceiling_dbtp) == (-24.0, 2.0, -2.0)
    # AES TD1004: target within -16 .. -20 LUFS, true peak at most -1 dBTP
    podcast = profile("podcast_episode")
    assert -20.0 <= podcast.loudness_lufs <= -16.0 and podcast.ceiling_dbtp <= -1.0
    assert podcast.container == "mp3" and podcast.mp3_kbps == 128
    speech = profile("speech_service_16k")
    assert (speech.rate_hz, speech.channel_layout, speech.bits) == (16000, "mono", "16")


@pytest.mark.parametrize("name", list(PROFILES))
def test_every_profile_names_its_sources_and_a_real_preset(name):
    p = profile(name)
    assert p.preset in PRESETS
    assert p.name == name and p.label
    for key in ("loudness_lufs", "ceiling_dbtp", "rate_hz"):
        value = getattr(p, key)
        if value is not None:
            assert p.sources.get(key), f"{name}.{key} has no source"
    assert isinstance(p.delivery(), Delivery)
    assert json.loads(json.dumps(p.to_dict()))["name"] == name


def test_every_field_can_be_overridden_and_the_source_says_so():
    p = profile("broadcast_programme", loudness_lufs=-24.0, rate_hz=44100, channel_layout="mono",
                mono_law="equal_power", limiter=False)
    assert p.loudness_lufs == -24.0 and p.rate_hz == 44100
    assert p.sources["loudness_lufs"] == "set by the user"
    assert p.sources["ceiling_dbtp"].startswith("EBU R 128")
    d = p.delivery()
    assert (d.channel_layout, d.mono_law, d.limiter) == ("mono", "equal_power", False)
    assert PROFILES["broadcast_programme"].loudness_lufs == -23.0     # the table is untouched
    assert profile_names()[0] == "podcast_episode"


def test_profile_refuses_unknown_names_fields_and_bad_values():
    with pytest.raises(ParameterError, match="profile must be one of podcast_episode"):
        profile("radio")
    with pytest.raises(ParameterError, match="unknown profile field 'loudness'"):
        profile("podcast_episode", loudness=-16)
    with pytest.raises(ParameterError, match="container must be one of wav, flac, mp3, got 'ogg'"):
        profile("podcast_episode", container="ogg")
    with pytest.raises(ParameterError, match="bits applies to wav and flac"):
        profile("podcast_episode", bits="16")
    with pytest.raises(ParameterError, match="mp3_kbps must be a whole number from 32 to 320"):
        profile("podcast_episode", mp3_kbps=500)
    with pytest.raises(ParameterError, match="loudness_tolerance_lu must be a number above 0"):
        profile("us_broadcast", loudness_tolerance_lu=-1.0)


def test_delivery_from_dict_takes_the_new_fields_by_their_names_and_refuses_unknown_keys():
    d = Delivery.from_dict({"loudness_lufs": -16, "loudness_tolerance_lu": 1, "limiter": True,
                            "max_limiting_db": 4, "channel_layout": "pick", "pick_channel": 2,
                            "mono_law": "sum", "mp3_kbps": 96, "mp3_mode": "variable"})
    assert (d.loudness_tolerance_lu, d.max_limiting_db) == (1.0, 4.0)
    assert d.to_dict() == Delivery.from_dict(d.to_dict()).to_dict()
    assert set(d.to_dict()) == {"bits", "dither", "dither_seed", "ceiling_dbtp", "loudness_lufs",
                                "loudness_tolerance_lu", "limiter", "max_limiting_db", "channel_layout",
                                "mono_law", "pick_channel", "mp3_kbps", "mp3_mode"}
    with pytest.raises(ParameterError, match="unknown delivery field 'layout'"):
        Delivery.from_dict({"layout": "mono"})
    with pytest.raises(ParameterError, match="limiter must be true or false, got 'yes'"):
        Delivery.from_dict({"limiter": "yes"})
    with pytest.raises(ParameterError, match="channel_layout must be one of keep, mono, pick, stereo"):
        Delivery.from_dict({"channel_layout": "5.1"})
    with pytest.raises(ParameterError, match="pick_channel must be a whole number from 1 to 64, got 0"):
        Delivery.from_dict({"pick_channel": 0})
    with pytest.raises(ParameterError, match="max_limiting_db must be a number from 0 to 40 dB"):
        Delivery.from_dict({"max_limiting_db": 50})
