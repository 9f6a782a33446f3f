"""The destination picker in the delivery settings, at 1280 x 800: choosing a destination fills
the rate, format, channels, loudness, ceiling and limiter from its profile, lists each number
with its source, and the conversion it starts is delivered and verified as the profile asks.

Outside checks: the speech-service profile's 16 kHz, 16-bit mono and -1 dBTP are common
practice (named in webapp/profiles.py); the delivered true peak is the server's verification of
the written file, which tests/test_delivery_chain.py checks against scipy.signal.resample_poly.
"""

import pytest

pytestmark = pytest.mark.browser


def state(page, key):
    return page.evaluate(f"() => window.rateferry.state.get('{key}')")


def test_a_destination_fills_the_delivery_and_its_conversion_meets_it(laptop, laptop_shot):
    page = laptop
    page.select_option("#out-profile", "speech_service_16k")
    delivery = state(page, "delivery")
    assert (delivery["channel_layout"], delivery["bits"], delivery["ceiling_dbtp"]) == ("mono", "16", -1)
    assert state(page, "route")["fs_out"] == 16000 and state(page, "format") == "wav"
    assert page.input_value("#out-channels") == "mono" and page.input_value("#out-ceiling") == "-1"
    sources = page.inner_text("#out-profile-sources")
    assert "common practice" in sources and "rate hz 16000" in sources
    # the picker sits in the delivery row, inside a 1280 px window
    right = page.evaluate("() => document.getElementById('out-profile').getBoundingClientRect().right")
    assert 0 < right <= 1280
    laptop_shot("destination-picker")
    # a user's change after the destination is kept
    page.fill("#out-ceiling", "-2")
    page.press("#out-ceiling", "Tab")
    page.click("#convert-start")
    page.wait_for_selector("#download-file", timeout=90000)
    made = state(page, "conversion")
    assert made["delivery"]["channel_layout"] == "mono" and made["delivery"]["ceiling_dbtp"] == -2
    report = made["figures"]["delivery_report"]
    assert report["met"] is True and made["figures"]["channels_out"] == 1
    assert made["figures"]["output"]["true_peak_dbtp"] <= -2.0
