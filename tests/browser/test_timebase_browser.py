"""The time base view in a real browser (Playwright + Debian's chromium) at 1280 x 800, on the
demo pair: measure, plot, listen before/after, the corrected conversion and its download.

What is checked against something outside the page:
* the demo track was made by scipy.signal.resample_poly with 26317/26316 (scripts/
  make_demo_pair.py), a clock 1e6/26316 = +37.9997 ppm fast: the measured interval holds it;
* the fitted line drawn is offset + drift * t (the time base model, t in s, drift in ppm -> ms
  per s is drift / 1000): its end points are checked against the JSON figures;
* the corrected file, read by soundfile, has the reference's rate and length (the issue's
  delivery rule).
"""

import os

import pytest
import soundfile as sf

from webapp.server import SOURCE_ROOT

pytestmark = pytest.mark.browser

DEMO = os.path.join(SOURCE_ROOT, "demo_media")
REFERENCE = os.path.join(DEMO, "tidewater_call_16k.flac")
TRUE_DRIFT_PPM = 1e6 / 26316      # resample_poly(26317, 26316), see the module docstring


def test_time_base_view_measures_listens_and_corrects_the_demo_pair(laptop_page, tmp_path):
    page = laptop_page
    os.makedirs(os.path.join(SOURCE_ROOT, "test-artifacts"), exist_ok=True)
    page.click("#tab-timebase")
    # the demo pair is chosen for us
    assert page.eval_on_selector("#clock-reference", "s => s.selectedOptions[0].textContent") \
        .startswith("tidewater_call_16k.flac")
    assert page.eval_on_selector("#clock-track", "s => s.selectedOptions[0].textContent") \
        .startswith("tidewater_guest_16k.flac")

    page.click("#clock-measure")
    page.wait_for_selector("#panel-timebase[data-measured='true']")
    fig = page.evaluate("""() => {
        const gd = document.getElementById('plot-timebase');
        return gd.data.map((t) => ({meta: t.meta, x: t.x, y: t.y}));
    }""")
    body = page.evaluate("""async () => {
        const cfg = JSON.parse(document.getElementById('rateferry-config').textContent);
        const r = await fetch(cfg.urls.drift, {method: 'POST', headers: {
            'Content-Type': 'application/json', 'X-Rateferry-Token': cfg.token},
            body: JSON.stringify(cfg.demo_pair)});
        return r.json();
    }""")
    assert body["drift_ppm_low"] <= TRUE_DRIFT_PPM <= body["drift_ppm_high"]
    fit = next(t for t in fig if t["meta"] == "fit")
    duration = body["duration_s"]
    assert fit["x"] == [0, pytest.approx(duration)]
    assert fit["y"][0] == pytest.approx(body["offset_ms"])
    assert fit["y"][1] == pytest.approx(body["offset_ms"] + body["drift_ppm"] * duration / 1000)
    used = next(t for t in fig if t["meta"] == "offsets_used")
    residuals = next(t for t in fig if t["meta"] == "residuals")
    assert len(used["x"]) == len(residuals["x"]) == body["windows_used"]
    text = page.inner_text("#clock-facts")
    assert "ppm" in text and "ms" in text and f"{body['windows_used']} of" in text
    page.screenshot(path=os.path.join(SOURCE_ROOT, "test-artifacts", "timebase-measured.png"))

    # listening: both sums arrive, playback starts quiet and switches while playing
    assert page.input_value("#clock-volume") == "-24"
    page.click("#clock-listen-prepare")
    page.wait_for_selector("#panel-timebase[data-listen-ready='true']")
    assert page.is_enabled("#clock-play")
    page.click("#clock-play")
    page.wait_for_function("() => document.getElementById('clock-play').textContent === 'Pause'")
    page.click("#clock-after")
    assert page.get_attribute("#clock-after", "aria-pressed") == "true"
    page.click("#clock-play")

    # the corrected conversion: progress, downloads, history
    page.click("#clock-convert")
    page.wait_for_selector("#clock-download-file", timeout=120000)
    with page.expect_download() as dl:
        page.click("#clock-download-file")
    path = tmp_path / dl.value.suggested_filename
    dl.value.save_as(path)
    assert path.name.startswith("tidewater_guest_16k_aligned_16k")
    info, ref = sf.info(str(path)), sf.info(REFERENCE)
    assert (info.samplerate, info.frames) == (ref.samplerate, ref.frames)
    page.uncheck("#history-this")
    page.wait_for_function("(name) => document.getElementById('history-list').textContent"
                           ".includes(name)", arg=path.name)
    page.screenshot(path=os.path.join(SOURCE_ROOT, "test-artifacts", "timebase-corrected.png"),
                    full_page=True)
