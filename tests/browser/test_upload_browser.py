"""A file chosen in the page (real chromium, real server): the upload carries the page's route,
so its spectra are ready when the page asks; a recording at the rate of the design shown keeps
that design; the overview is drawn over the last one and still takes a click.

What is checked against something outside the page: a sampled sine's spectrum peaks at its
frequency (physics; the Welch bin is 44100 / 8192 = 5.4 Hz wide) and its envelope is its
amplitude; the Nyquist limit is half the sample rate (Nyquist-Shannon).
"""

import numpy as np
import pytest
import soundfile as sf

pytestmark = pytest.mark.browser


def _tone(path, rate, seconds=4.0, hz=1000.0, amplitude=0.25):
    t = np.arange(int(rate * seconds)) / rate
    x = amplitude * np.sin(2 * np.pi * hz * t)
    sf.write(str(path), np.column_stack([x, x]), rate, subtype="PCM_16")


def _state(page, key):
    return page.evaluate("(k) => window.rateferry.state.get(k)", key)


def _asked(page):
    """Every API request the page makes from now on, as 'METHOD /path'."""
    seen = []
    page.on("request", lambda r: "/api/" in r.url and seen.append(
        f"{r.method} {r.url.split('//', 1)[1].split('/', 1)[1].split('?')[0]}"))
    return seen


def _chosen(page, path):
    """Choose ``path``; returns the spectra the page got for it and its overview, once shown."""
    with page.expect_response(lambda r: r.url.endswith("/api/spectra")) as answer:
        page.set_input_files("#file-input", str(path))
    page.wait_for_function("""(name) => {
        const r = window.rateferry.state.get('recording');
        const sp = window.rateferry.state.get('spectra');
        return r && r.name === name && document.getElementById('overview-view').dataset.recording === r.id
            && sp && sp.recording_id === r.id; }""", arg=path.name)
    return answer.value.json()


@pytest.mark.parametrize("size", ["page", "laptop"])
def test_a_file_at_the_design_rate_keeps_the_design_and_finds_its_spectra_ready(
        request, size, tmp_path):
    page = request.getfixturevalue(size)          # 1500 x 1000, then a 1280 x 800 laptop
    page.wait_for_function("() => document.getElementById('plot-overview').data")
    design = _state(page, "design")
    assert design["fs_in"] == 44100                 # the demo's rate
    wav = tmp_path / f"tone_{size}.wav"
    _tone(wav, 44100, seconds=20.0)
    asked = _asked(page)
    spectra = _chosen(page, wav)
    rec = _state(page, "recording")

    # the spectra were computed beside the upload's analysis: the page's request found them
    assert spectra["cached"] is True and spectra["recording_id"] == rec["id"]
    assert spectra["design_id"] == design["id"]
    peak = spectra["source"]["freqs_hz"][int(np.argmax(spectra["source"]["psd_db"]))]
    assert peak == pytest.approx(1000.0, abs=5.4)
    assert spectra["source"]["nyquist_hz"] == 44100 / 2
    # the same rate, the same route: the same design, neither estimated nor designed again
    assert _state(page, "design")["id"] == design["id"]
    assert not [a for a in asked if a in ("POST api/designs", "POST api/estimates")], asked
    assert asked[0] == "POST api/recordings"
    gains = page.evaluate("() => document.getElementById('plot-spectra').data"
                          ".filter((t) => t.meta === 'filter_gain').length")
    assert gains == 1

    # the overview, drawn over the demo's plot: the tone's envelope, one column per pixel, shown
    drawn = page.evaluate("""() => {
        const gd = document.getElementById('plot-overview');
        const max = gd.data.find((t) => t.meta === 'overview_max');
        return { n: max.x.length, top: Math.max(...max.y), width: gd.clientWidth,
                 hidden: gd.classList.contains('waiting'), visibility: getComputedStyle(gd).visibility,
                 columns: window.rateferry.state.get('overviewColumns') }; }""")
    assert drawn["top"] == pytest.approx(0.25, abs=1e-3)
    assert drawn["n"] == drawn["columns"] == round(drawn["width"])
    assert not drawn["hidden"] and drawn["visibility"] == "visible"
    # and it still takes a click: the (10 s) excerpt moves to about 5 s
    xy = page.evaluate("""() => { const gd = document.getElementById('plot-overview');
        const xa = gd._fullLayout.xaxis; const b = gd.getBoundingClientRect();
        return [b.left + gd._fullLayout._size.l + xa.l2p(5.0), b.top + gd._fullLayout._size.t + gd._fullLayout._size.h / 2]; }""")
    page.mouse.click(*xy)
    page.wait_for_function("() => Math.abs(window.rateferry.state.get('excerpt').start_s - 5) < 0.3")

    # the list of recordings has it, chosen
    page.wait_for_function("(id) => window.rateferry.state.get('recordings').filter((r) => r.id === id).length === 1",
                           arg=rec["id"])
    assert page.input_value("#recording-select") == rec["id"]


def test_a_file_at_another_rate_gets_its_own_design_and_spectra(page, tmp_path):
    wav = tmp_path / "tone_32k.wav"
    _tone(wav, 32000)
    asked = _asked(page)
    spectra = _chosen(page, wav)
    page.wait_for_function("() => { const d = window.rateferry.state.get('design'); return d && d.fs_in === 32000; }")
    design = _state(page, "design")
    assert "POST api/designs" in asked
    assert spectra["source"]["nyquist_hz"] == 32000 / 2
    peak = spectra["source"]["freqs_hz"][int(np.argmax(spectra["source"]["psd_db"]))]
    assert peak == pytest.approx(1000.0, abs=32000 / 8192)
    # the spectra drawn are the new design's, with its gain
    page.wait_for_function("""(id) => { const sp = window.rateferry.state.get('spectra');
        const gd = document.getElementById('plot-spectra');
        return sp.design_id === id && gd.data.some((t) => t.meta === 'filter_gain'); }""",
                           arg=design["id"])
