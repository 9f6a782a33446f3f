"""The page in a real browser (Playwright + Debian's chromium) against the real server.

What is checked against something outside the page:
* Nyquist limits are half the sample rate (Nyquist-Shannon; any DSP text, e.g. Oppenheim &
  Schafer, Discrete-Time Signal Processing, 1989, sec. 4.2).
* The automatic passband edge is passband_fraction (0.9 in the spoken_word_delivery preset) of the
  lower Nyquist, the stopband edge the lower Nyquist (the project's spec, webapp/dsp/spec.py,
  a common-practice default).
* A converted file holds ceil(frames * up / down) frames (the alignment rule in DEVELOPERS.md),
  with up/down the reduced ratio from fractions.Fraction (Python's standard library).
* The blind-trial p-value equals scipy.stats.binomtest(k, n, 0.5, alternative="greater")
  (scipy is our reference library).
"""

import json
import math
import os
from fractions import Fraction

import numpy as np
import pytest
import soundfile as sf
from scipy import stats

from webapp.server import SOURCE_ROOT

DEMO = os.path.join(SOURCE_ROOT, "demo_media", "harbour_interview_44k1.flac")

pytestmark = pytest.mark.browser


def figure(page, plot_id):
    """The plotly figure of a plot element: its traces (meta, x range) and named shapes."""
    return page.evaluate(
        """(id) => {
            const gd = document.getElementById(id);
            const finite = (a) => (a || []).filter((v) => typeof v === 'number' && isFinite(v));
            return {
                traces: gd.data.map((t) => ({meta: t.meta || null, name: t.name,
                    xmin: Math.min(...finite(t.x)), xmax: Math.max(...finite(t.x)), n: (t.x || []).length})),
                shapes: (gd.layout.shapes || []).map((s) => ({name: s.name || null, x0: s.x0, x1: s.x1})),
                annotations: (gd.layout.annotations || []).map((a) => ({name: a.name || null, text: a.text})),
                xrange: gd.layout.xaxis.range,
            };
        }""", plot_id)


def shape(fig, name):
    found = [s for s in fig["shapes"] if s["name"] == name]
    assert len(found) == 1, (name, fig["shapes"])
    return found[0]


def trace(fig, meta):
    found = [t for t in fig["traces"] if t["meta"] == meta]
    assert len(found) == 1, (meta, [t["meta"] for t in fig["traces"]])
    return found[0]


def wait_nyquist(page, which, hz):
    page.wait_for_function(
        """([which, hz]) => {
            const gd = document.getElementById('plot-spectra');
            const s = (gd.layout.shapes || []).find((s) => s.name === which + '_nyquist');
            return s && s.x0 === hz;
        }""", arg=[which, hz])


def wait_target_nyquist(page, hz):
    wait_nyquist(page, "target", hz)


def design_state(page):
    return page.evaluate("() => { const d = window.rateferry.state.get('design'); "
                         "return d && {fs_in: d.fs_in, fs_out: d.fs_out, mask: d.mask, verdict: d.verdict}; }")


def run_conversion(page):
    page.click("#convert-start")
    page.wait_for_selector("#download-file", timeout=90000)
    return page.evaluate("() => window.rateferry.state.get('conversion')")


# ------------------------------------------------------------------------------------------


def test_demo_loads_with_its_figures_spectra_and_verdict(page, shot):
    info = sf.info(DEMO)
    facts = page.inner_text("#recording-facts")
    assert "44.1\u202fkHz" in facts
    assert f"{info.frames:,}".replace(",", "\u202f") in facts       # frames as soundfile reads them
    assert "LUFS" in facts and "dBTP" in facts and "dBFS" in facts
    assert page.inner_text("#tb-recording") == os.path.basename(DEMO)
    assert "44.1\u202fkHz \u2192 48\u202fkHz" in page.inner_text("#tb-route")

    fig = figure(page, "plot-spectra")
    assert shape(fig, "source_nyquist")["x0"] == info.samplerate / 2
    assert shape(fig, "target_nyquist")["x0"] == 48000 / 2
    src, tgt = trace(fig, "source_psd"), trace(fig, "target_psd")
    assert src["n"] > 100 and tgt["n"] > 100
    assert src["xmax"] <= info.samplerate / 2 + 1e-6
    assert tgt["xmax"] <= 48000 / 2 + 1e-6
    for name in ("mask_passband", "mask_transition", "mask_stopband", "filter_gain"):
        trace(fig, name)

    d = design_state(page)
    chip = page.inner_text("#tb-verdict")
    headline = page.inner_text("#verdict-headline")
    if d["verdict"]["meets_mask"]:
        assert chip.startswith("meets the mask") and headline == "Meets the mask"
    else:
        assert chip.startswith("misses the mask") and headline.startswith("Does not meet")
    # every cost figure carries its unit
    cost = page.inner_text("#design-cost")
    for unit in ("taps", "MMAC/s", "ms", "multiply-adds"):
        assert unit in cost
    shot("01-demo-spectra")

    # every control has a name a screen reader can speak
    unnamed = page.evaluate("""() => [...document.querySelectorAll('input, select, textarea, button')]
        .filter((c) => c.type !== 'hidden')
        .filter((c) => !(c.labels && c.labels.length) && !c.getAttribute('aria-label')
                       && !c.getAttribute('aria-labelledby') && !(c.textContent || '').trim())
        .map((c) => c.id || c.name || c.outerHTML.slice(0, 80))""")
    assert unnamed == []


def test_upload_loads_a_new_recording_and_a_bad_one_is_refused_beside_the_file_control(page, shot, tmp_path):
    # 2 s of a 1 kHz sine at 32 kHz, stereo, written by soundfile
    rate = 32000
    t = np.arange(2 * rate) / rate
    tone = 0.25 * np.sin(2 * np.pi * 1000 * t)
    wav = tmp_path / "tone_32k.wav"
    sf.write(str(wav), np.column_stack([tone, tone]), rate, subtype="PCM_16")
    page.set_input_files("#file-input", str(wav))
    page.wait_for_function("() => document.getElementById('tb-recording').textContent === 'tone_32k.wav'")
    facts = page.inner_text("#recording-facts")
    assert "32 kHz" in facts and "2 (stereo)" in facts and "64 000 frames" in facts
    # a full-scale sine has a true peak of 0 dBFS; at amplitude 0.25 it is 20 log10(0.25) = -12.0
    assert "−12.0 dBTP" in facts
    wait_nyquist(page, "source", rate / 2)
    assert shape(figure(page, "plot-spectra"), "target_nyquist")["x0"] == 48000 / 2
    # the overview was drawn by the upload's own read of the file (its answer was kept: "read
    # ... earlier"), in the columns the page asked for (its plot's width in pixels when the
    # upload started); its envelope is the sine's, +-0.25
    page.wait_for_function("""() => {
        const r = window.rateferry.state.get('recording');
        return r && document.getElementById('overview-view').dataset.recording === r.id; }""")
    assert "earlier" in page.inner_text("#overview-summary")
    drawn = page.evaluate("""() => {
        const gd = document.getElementById('plot-overview');
        const max = gd.data.find((t) => t.meta === 'overview_max');
        return { n: max.x.length, top: Math.max(...max.y),
                 columns: window.rateferry.state.get('overviewColumns') }; }""")
    assert drawn["n"] == drawn["columns"] and 200 <= drawn["columns"] <= 4000
    assert drawn["top"] == pytest.approx(0.25, abs=1e-3)

    bad = tmp_path / "not_audio.wav"
    bad.write_bytes(b"this is not a RIFF file at all" * 10)
    page.set_input_files("#file-input", str(bad))
    slot = page.locator("#load-view [data-error-for='file']")
    slot.wait_for(state="visible")
    assert "not_audio.wav" in slot.inner_text()
    assert page.inner_text("#tb-recording") == "tone_32k.wav"          # nothing else changed
    shot("00-upload-refused")


def test_new_target_rate_moves_the_nyquist_line_and_the_mask(page, shot):
    page.select_option("#fs-out", "16000")
    wait_target_nyquist(page, 8000)
    fig = figure(page, "plot-spectra")
    assert shape(fig, "source_nyquist")["x0"] == 22050
    # mask edges for 44.1 kHz -> 16 kHz: passband 0.9 x 8000 Hz, stopband from 8000 Hz
    assert trace(fig, "mask_passband")["xmax"] == pytest.approx(0.9 * 8000)
    assert trace(fig, "mask_stopband")["xmin"] == pytest.approx(8000)
    # the converted spectrum ends at the new Nyquist; the source part above it is highlighted
    assert trace(fig, "target_psd")["xmax"] <= 8000 + 1e-6
    above = trace(fig, "above_target_nyquist")
    assert above["xmin"] >= 8000 and above["xmax"] <= 22050
    assert "8\u202fkHz" in page.inner_text("#spectra-summary")
    assert "would alias without the filter" in page.inner_text("#spectra-alias")
    d = design_state(page)
    assert (d["fs_in"], d["fs_out"]) == (44100, 16000)
    assert d["mask"]["lower_nyquist_hz"] == 8000
    assert "44.1\u202fkHz \u2192 16\u202fkHz" in page.inner_text("#tb-route")
    shot("02-spectra-16k")

    # the filter view follows: magnitude against the mask, with both Nyquist lines
    page.click("#tab-filter")
    page.wait_for_function("() => document.getElementById('plot-magnitude').data")
    mag = figure(page, "plot-magnitude")
    assert shape(mag, "target_nyquist")["x0"] == 8000
    assert trace(mag, "mask_passband")["xmax"] == pytest.approx(7200)
    impulse = figure(page, "plot-impulse")
    assert any(s["name"] == "prering" for s in impulse["shapes"])   # linear phase rings before
    page.wait_for_selector("#plans table")
    shot("03-filter-16k")

    # the audit runs the real converter for this route and plots what it measured
    with page.expect_response(lambda r: r.url.endswith("/api/audits")) as answer:
        page.click("#tab-audit")
    audit = answer.value.json()["figures"]
    page.wait_for_selector("#audit-headline")
    assert page.inner_text("#audit-headline") == (
        "The converter meets the mask on its real output" if audit["passes"]
        else "The converter misses the mask on its real output")
    assert (audit["fs_in"], audit["fs_out"], audit["direction"]) == (44100, 16000, "down")
    art = figure(page, "plot-audit-artefacts")
    measured = trace(art, "audit_measured")
    assert measured["n"] == len(audit["curves"]["alias"]["input_hz"])
    trace(art, "audit_predicted")
    assert shape(art, "audit_edge")["x0"] == 8000
    dev = figure(page, "plot-audit-deviation")
    assert trace(dev, "audit_pb_measured")["xmax"] <= 7200 + 1e-6
    assert "Worst alias" in page.inner_text("#audit-table")
    shot("03b-audit-16k")

    # any integer rate: 37 800 Hz (the "other" field); the spectra redraw when shown again
    page.click("#tab-spectra")
    page.select_option("#fs-out", "other")
    page.fill("#fs-out-custom", "37800")
    wait_target_nyquist(page, 18900)
    assert design_state(page)["fs_out"] == 37800


def test_impossible_mask_shows_the_verdict_and_the_error_beside_its_field(page, shot):
    page.fill("#spec-stopband-hz", "5000")        # below the 19 845 Hz passband edge
    slot = page.locator("[data-error-for='stopband_hz']").first
    slot.wait_for(state="visible")
    assert "stopband_hz must be above passband_hz" in slot.inner_text()
    assert page.get_attribute("#spec-stopband-hz", "aria-invalid") == "true"
    # the slot sits in the same field as the control
    assert page.evaluate("() => document.getElementById('spec-stopband-hz').closest('.field')"
                         ".contains(document.querySelector(\"[data-error-for='stopband_hz']\"))")
    assert page.inner_text("#verdict strong") == "No design for this mask"
    assert "no design" in page.inner_text("#tb-verdict")
    assert page.get_attribute("#verdict", "class") == "verdict fail"
    shot("04-impossible-mask")
    slot.scroll_into_view_if_needed()
    shot("04-impossible-mask-field", top=False)

    # clearing the field brings the automatic edge and a design back
    page.fill("#spec-stopband-hz", "")
    page.wait_for_selector("[data-error-for='stopband_hz']", state="hidden")
    page.wait_for_function("() => !window.rateferry.state.get('designError')")

    # a method that cannot reach the mask: its error goes beside the method control
    page.select_option("#spec-method", "equiripple")
    slot = page.locator("[data-error-for='method']").first
    slot.wait_for(state="visible")
    assert "equiripple" in slot.inner_text()
    assert page.evaluate("() => document.getElementById('spec-method').closest('.field')"
                         ".contains(document.querySelector(\"[data-error-for='method']\"))")


def test_conversion_runs_to_the_end_and_its_file_sheet_and_recipe_download(page, shot, tmp_path):
    conv = run_conversion(page)
    assert conv["status"] == "done"
    assert page.get_attribute("#convert-progress", "value") == "100"
    assert page.inner_text("#convert-status").startswith("Done in")

    with page.expect_download() as d:
        page.click("#download-file")
    path = tmp_path / d.value.suggested_filename
    d.value.save_as(path)
    # the page opens on the spoken-word preset, which delivers 16-bit files
    assert d.value.suggested_filename == "harbour_interview_44k1_48k_16bit.flac"
    src = sf.info(DEMO)
    ratio = Fraction(48000, src.samplerate)
    out = sf.info(str(path))
    assert out.samplerate == 48000
    assert out.channels == src.channels
    assert out.frames == math.ceil(src.frames * ratio.numerator / ratio.denominator)
    assert out.subtype == "PCM_16"
    data, _ = sf.read(str(path))
    assert np.all(np.isfinite(data))
    assert 0 < np.max(np.abs(data)) <= 1.0

    page.fill("#sheet-title", "Harbour interview, video edit")
    with page.expect_download() as s:
        page.click("#download-sheet")
    sheet = tmp_path / "sheet.html"
    s.value.save_as(sheet)
    html = sheet.read_text(encoding="utf-8")
    assert html.lstrip().lower().startswith("<!doctype html")
    assert "Harbour interview, video edit" in html

    with page.expect_download() as r:
        page.click("#download-recipe")
    recipe_path = tmp_path / "recipe.json"
    r.value.save_as(recipe_path)
    recipe = json.loads(recipe_path.read_text(encoding="utf-8"))
    assert json.dumps(recipe).count(conv["figures"]["output_sha256"]) >= 1
    # the recipe is named as the command line and the sheet name it
    assert r.value.suggested_filename == "harbour_interview_44k1_48k_16bit.recipe.json"

    # the history lists it, done
    item = page.locator(f"#history-list li[data-id='{conv['id']}']")
    item.wait_for()
    assert item.get_attribute("data-status") == "done"
    page.locator("#convert-result").scroll_into_view_if_needed()
    shot("05-conversion-done", top=False)

    # the recipe goes back in and fills the controls
    page.select_option("#fs-out", "16000")
    page.set_input_files("#recipe-file", str(recipe_path))
    page.wait_for_function("() => window.rateferry.state.get('route').fs_out === 48000")
    assert "Recipe loaded" in page.inner_text("#recipe-status")


def test_ab_switch_keeps_the_playhead_and_the_difference_needs_the_caution(page, shot):
    page.click("#tab-listen")
    assert page.input_value("#listen-volume") == "-24"       # playback starts quiet
    page.click("#listen-prepare")
    page.wait_for_selector("#listen-play:not([disabled])", timeout=60000)
    device = page.evaluate("() => { const c = new AudioContext(); const r = c.sampleRate; c.close(); return r; }")
    rendition = page.evaluate("() => { const id = document.getElementById('panel-listen').dataset.rendition; return id; }")
    assert rendition
    cards = page.inner_text("#renditions")
    assert cards.count("the browser does not resample it") == 2, cards
    assert f"{device / 1000:g}\u202fkHz" in page.inner_text("#listen-device")
    assert "level match" in cards.lower() and "shift" in cards

    page.keyboard.press("Space")                               # play
    page.wait_for_function("() => Number(document.getElementById('playhead').dataset.seconds) > 0.5")
    before = float(page.get_attribute("#playhead", "data-seconds"))
    page.keyboard.press("b")
    switched = float(page.get_attribute("#playhead", "data-switched-at"))
    assert page.get_attribute("#playhead", "data-switched-to") == "B"
    assert page.get_attribute("#listen-b", "aria-pressed") == "true"
    assert before <= switched <= before + 0.25
    page.wait_for_timeout(400)
    after = float(page.get_attribute("#playhead", "data-seconds"))
    assert 0.3 <= after - switched <= 1.0                      # it went on from there
    assert page.get_attribute("#playhead", "data-starts") == "1"   # the sources never restarted
    page.keyboard.press("a")
    assert page.get_attribute("#playhead", "data-switched-to") == "A"
    assert float(page.get_attribute("#playhead", "data-switched-at")) >= after
    shot("06-listening-ab")

    # difference: a boost is held at +0 dB until the hearing caution is acknowledged
    assert "Hearing caution" in page.inner_text("#listen-caution")
    page.fill("#listen-diff-gain", "30")
    page.wait_for_selector("#boost-dialog", state="visible")
    assert page.input_value("#listen-diff-gain") == "0"
    page.locator("#boost-dialog").scroll_into_view_if_needed()
    shot("07-difference-caution", top=False)
    page.click("#boost-allow")
    assert page.input_value("#listen-diff-gain") == "30"
    page.keyboard.press("d")
    assert page.get_attribute("#listen-d", "aria-pressed") == "true"
    assert "boosted 30\u202fdB" in page.inner_text("#now-playing")
    page.keyboard.press("Space")                               # pause
    page.wait_for_function("() => document.getElementById('playhead').dataset.playing === 'false'")


def test_blind_trial_keeps_score_and_p_value_and_saves_them_for_the_sheet(page, shot, server):
    conv = run_conversion(page)
    page.click("#tab-listen")
    page.check("#listen-from-conversion")
    page.fill("#listen-length", "4")
    page.click("#listen-prepare")
    page.wait_for_selector("#listen-play:not([disabled])", timeout=60000)
    assert "the converted file" in page.inner_text("#renditions")
    page.select_option("#blind-count", "6")
    page.click("#blind-start")
    assert page.get_attribute("#listen-x", "disabled") is None
    page.keyboard.press("Space")
    for i in range(6):
        page.keyboard.press("x")
        page.keyboard.press("a" if i % 2 else "b")
        page.click("#blind-answer-a" if i % 3 else "#blind-answer-b")
        if i == 2:
            answered = int(page.get_attribute("#blind-score", "data-answered"))
            right = int(page.get_attribute("#blind-score", "data-correct"))
            assert answered == 3
            p = float(page.get_attribute("#blind-score", "data-p-value"))
            assert p == pytest.approx(stats.binomtest(right, 3, 0.5, alternative="greater").pvalue, rel=1e-12)
            page.locator("#blind-h").scroll_into_view_if_needed()
            shot("08-blind-trial", top=False)
    page.wait_for_selector("#blind-note[data-saved]")
    items = page.locator("#blind-list li").all_inner_texts()
    right = sum(t.endswith("right") for t in items)
    assert len(items) == 6
    assert int(page.get_attribute("#blind-score", "data-correct")) == right
    expected = stats.binomtest(right, 6, 0.5, alternative="greater").pvalue
    assert float(page.get_attribute("#blind-score", "data-p-value")) == pytest.approx(expected, rel=1e-12)
    assert f"{right} of 6 right" in page.inner_text("#blind-score")

    saved = page.request.get(f"{server}/api/conversions/{conv['id']}/blind_trials").json()
    assert saved["summary"]["trials"] == 6 and saved["summary"]["correct"] == right
    assert saved["summary"]["p_value"] == pytest.approx(expected, rel=1e-12)
    page.locator("#blind-list").scroll_into_view_if_needed()
    shot("09-blind-trial-saved", top=False)


def test_long_conversion_shows_progress_with_eta_and_can_be_cancelled(page, shot, tmp_path):
    # three minutes of stereo noise at 44.1 kHz, converted to 192 kHz: long enough to cancel
    rng = np.random.default_rng(20261201)
    path = tmp_path / "three_minutes_44k1.wav"
    sf.write(str(path), 0.1 * rng.standard_normal((44100 * 180, 2)), 44100, subtype="PCM_16")
    page.set_input_files("#file-input", str(path))
    page.wait_for_function("() => document.getElementById('tb-recording').textContent === "
                           "'three_minutes_44k1.wav'", timeout=120000)
    page.select_option("#fs-out", "192000")
    page.wait_for_function("() => { const d = window.rateferry.state.get('design'); "
                           "return d && d.fs_out === 192000 && !window.rateferry.state.get('designBusy'); }")
    page.click("#convert-start")
    page.wait_for_function("() => /^Converting: [0-9]+\\u202f% /.test(document.getElementById('convert-status').textContent)"
                           " && Number(document.getElementById('convert-progress').value) > 0", timeout=60000)
    status = page.inner_text("#convert-status")
    assert "frames read" in status and "left" in status and "so far" in status
    assert page.is_visible("#convert-cancel")
    # the list shows the same progress as the status line: both read the same conversion
    running = page.evaluate("() => window.rateferry.state.get('conversion').id")
    page.wait_for_selector(f"#history-list li[data-id='{running}']")
    same = page.evaluate("""(id) => {
        const li = document.querySelector(`#history-list li[data-id='${id}']`);
        const bar = document.getElementById('convert-progress');
        return li && [Number(li.dataset.percent), Math.round(Number(bar.value))];
    }""", running)
    assert same and same[0] == same[1]
    shot("10-conversion-progress", top=False)
    page.click("#convert-cancel")
    page.wait_for_function("() => document.getElementById('convert-status').textContent.startsWith('Cancelled')")
    conv = page.evaluate("() => window.rateferry.state.get('conversion')")
    assert conv["status"] == "cancelled"
    assert page.locator("#download-file").count() == 0
    item = page.locator(f"#history-list li[data-id='{conv['id']}']")
    item.wait_for()
    assert item.get_attribute("data-status") == "cancelled"
