"""A design sheet opened from disk in a real browser (Playwright + Debian chromium).

Checks: the page loads from file:// with no request to anything but itself, no console error
and no page error; every plot area holds a drawn plotly chart (svg with traces); the print
stylesheet hides the buttons and breaks pages between sections; printing to PDF works.

Skipped when /usr/bin/chromium is missing, unless RATEFERRY_REQUIRE_BROWSER=1 (then it fails):
the ``browser`` fixture of tests/browser/conftest.py decides.
"""

import os
import re

import numpy as np
import pytest
import soundfile as sf

from webapp import jobs, sheet
from webapp import recipe as recipe_module
from webapp.delivery import Delivery
from webapp.dsp.spec import Spec

pytestmark = pytest.mark.browser


# ``browser`` (Debian chromium through Playwright; skip or fail when it is missing) comes from
# tests/browser/conftest.py.


def _sheet(folder, fs_out, spec, **options):
    rate = 44100
    t = np.arange(int(rate * 1.0)) / rate
    x = np.stack([0.4 * np.sin(2 * np.pi * 1000 * t), 0.2 * np.sin(2 * np.pi * 7000 * t)], 1)
    src = folder / "source.wav"
    sf.write(src, x, rate, subtype="PCM_16")
    res = jobs.convert_file(src, folder / f"out_{fs_out}.wav", spec=spec, fs_out=fs_out,
                                delivery=Delivery(bits="16"))
    return sheet.write_sheet(res, folder / f"sheet_{fs_out}.html", title="Review <copy>",
                             author="R. Mixer", note="Two tones.\nNothing else.", **options)


@pytest.fixture(scope="module", params=["single", "multistage"])
def opened(request, browser, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"browser-{request.param}")
    if request.param == "single":
        path = _sheet(folder, 48000, Spec(), blind={"trials": 16, "correct": 12})
    else:
        path = _sheet(folder, 8000, Spec(stages="auto"), audit=None)
    page = browser.new_page(viewport={"width": 1200, "height": 900})
    console, errors, requests = [], [], []
    page.on("console", lambda m: console.append((m.type, m.text)))
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    page.goto("file://" + os.path.abspath(path))
    page.wait_for_function(
        "document.querySelectorAll('div.plot[data-plot]').length > 0 && "
        "Array.from(document.querySelectorAll('div.plot[data-plot]'))"
        ".every(d => d.querySelector('svg.main-svg'))", timeout=20000)
    yield dict(page=page, console=console, errors=errors, requests=requests, path=path,
               kind=request.param)
    page.close()


def test_sheet_opens_from_disk_without_errors_or_outside_requests(opened):
    assert opened["errors"] == []
    assert [m for m in opened["console"] if m[0] in ("error", "warning")] == []
    url = "file://" + os.path.abspath(opened["path"])
    assert [r for r in opened["requests"] if r != url and not r.startswith(("data:", "blob:"))] \
        == []
    assert opened["page"].title() == "Review <copy>"


def test_every_plot_is_drawn(opened):
    page = opened["page"]
    drawn = page.evaluate("""() => Array.from(document.querySelectorAll('div.plot[data-plot]'))
        .map(d => ({id: d.getAttribute('data-plot'),
                    plotly: d.classList.contains('js-plotly-plot'),
                    traces: d.querySelectorAll('.scatterlayer .trace').length,
                    paths: Array.from(d.querySelectorAll('.scatterlayer path.js-line'))
                      .filter(p => (p.getAttribute('d') || '').length > 20).length}))""")
    ids = {d["id"] for d in drawn}
    expected = {"response", "passband", "impulse", "spectra"}
    if opened["kind"] == "single":
        expected |= {"audit-deviation", "audit-alias", "audit-impulse"}
    assert expected <= ids
    for d in drawn:
        assert d["plotly"] and d["traces"] >= 1 and d["paths"] >= 1, d


def test_user_text_shows_as_text(opened):
    page = opened["page"]
    assert page.locator("h1").inner_text() == "Review <copy>"
    assert page.locator(".note").inner_text() == "Two tones.\nNothing else."
    assert page.locator("copy").count() == 0


def test_print_stylesheet_hides_buttons_and_breaks_pages(opened):
    page = opened["page"]
    page.emulate_media(media="print")
    try:
        styles = page.evaluate("""() => ({
            button: getComputedStyle(document.getElementById('rf-print')).display,
            toolbar: getComputedStyle(document.querySelector('.toolbar')).display,
            breaks: Array.from(document.querySelectorAll('section.sheet-section'))
              .map(s => getComputedStyle(s).breakBefore),
            plotWidth: getComputedStyle(document.querySelector('div.plot')).width})""")
        assert styles["button"] == "none" and styles["toolbar"] == "none"
        assert styles["breaks"][0] != "page"
        assert set(styles["breaks"][1:]) == {"page"}
        # 180 mm at 96 px per inch
        assert float(styles["plotWidth"].rstrip("px")) == pytest.approx(180 / 25.4 * 96, abs=1)
        pdf = page.pdf(format="A4")
        assert pdf.startswith(b"%PDF")
        pages = len(re.findall(rb"/Type\s*/Page(?!s)", pdf))
        sections = len(styles["breaks"])
        assert pages >= sections      # one page at least per section
    finally:
        page.emulate_media(media="screen")


def test_save_recipe_button_downloads_the_embedded_recipe(opened, tmp_path):
    page = opened["page"]
    with page.expect_download() as info:
        page.click("#rf-save-recipe")
    target = tmp_path / "r.json"
    info.value.save_as(target)
    loaded = recipe_module.load_recipe(target)
    embedded = page.evaluate("JSON.parse(document.getElementById('rf-recipe').textContent)")
    assert loaded.to_dict() == embedded
    assert info.value.suggested_filename.endswith(".recipe.json")
