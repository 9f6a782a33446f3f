"""The page as a daily workstation, at 1280 x 800 (a laptop) as well as the large viewport:
nothing wider than the window on any tab, the convert action always in view, a past conversion
restored with every setting that made it, stale results marked, settings remembered across
reloads, the estimate before an extreme design, the overview setting the excerpt, blind trials
that hide the answers until the end.

Outside checks: Kaiser's length estimate (Kaiser 1974, as scipy.signal.kaiserord computes it:
our reference library) for the extreme design; the blind-trial p-value equals
scipy.stats.binomtest(k, n, 0.5, alternative="greater").
"""

import os

import pytest
from scipy import signal, stats

from webapp.server import SOURCE_ROOT

pytestmark = pytest.mark.browser
TABS = ("spectra", "filter", "audit", "listen")


def overflow(page):
    """How far the page is wider than the window, and the widest element past its panel."""
    return page.evaluate("""() => {
        const doc = document.documentElement.scrollWidth - window.innerWidth;
        let worst = null;
        for (const panel of document.querySelectorAll('.panel, .tabpanel, .actionbar, .topbar')) {
            if (panel.offsetParent === null) continue;
            const right = panel.getBoundingClientRect().right;
            for (const el of panel.querySelectorAll('*')) {
                if (el.offsetParent === null || el.closest('.table-scroll, .plot, .js-plotly-plot')) continue;
                const over = el.getBoundingClientRect().right - right;
                if (over > 1 && (!worst || over > worst.over)) worst = {over, id: el.id, tag: el.tagName, cls: el.className};
            }
        }
        return {doc, worst};
    }""")


def action_in_view(page):
    return page.evaluate("""() => {
        const r = document.getElementById('convert-start').getBoundingClientRect();
        return r.top >= 0 && r.bottom <= window.innerHeight && r.width > 0;
    }""")


def state(page, key):
    return page.evaluate(f"() => window.rateferry.state.get('{key}')")


@pytest.mark.parametrize("size", ["laptop", "page"])
def test_no_tab_is_wider_than_the_window_and_the_action_stays_in_view(size, request, server):
    page = request.getfixturevalue(size)
    shoot = request.getfixturevalue("laptop_shot" if size == "laptop" else "shot")
    # the top bar holds one line
    assert page.evaluate("() => document.getElementById('topbar').getBoundingClientRect().height") < 60
    for tab in TABS:
        page.click(f"#tab-{tab}")
        if tab == "audit":
            page.wait_for_selector("#audit-headline", timeout=120000)
        page.wait_for_timeout(300)
        o = overflow(page)
        assert o["doc"] <= 0 and o["worst"] is None, (tab, o)
        assert action_in_view(page), tab
        page.evaluate("window.scrollTo(0, document.body.scrollHeight)")
        assert action_in_view(page), tab
        shoot(f"20-{size}-{tab}-bottom", top=False)
        page.evaluate("window.scrollTo(0, 0)")
        shoot(f"20-{size}-{tab}")
    summary = page.inner_text("#action-summary")
    assert "44.1\u202fkHz \u2192 48\u202fkHz" in summary and "Spoken word delivery" in summary
    assert "FLAC 16-bit" in summary and "mask" in summary


def test_a_past_conversion_comes_back_with_everything_that_made_it(laptop, laptop_shot):
    page = laptop
    # the excerpt from a click on the overview, at about 6 s (3 s long)
    page.wait_for_function("() => document.getElementById('plot-overview').data")
    page.click("#tab-listen")
    page.fill("#listen-length", "3")
    page.press("#listen-length", "Tab")
    x = page.evaluate("""() => { const gd = document.getElementById('plot-overview');
        const xa = gd._fullLayout.xaxis; const b = gd.getBoundingClientRect();
        return [b.left + gd._fullLayout._size.l + xa.l2p(6.0), b.top + gd._fullLayout._size.t + gd._fullLayout._size.h / 2]; }""")
    page.mouse.click(*x)
    page.wait_for_function("() => Math.abs(window.rateferry.state.get('excerpt').start_s - 6) < 0.3")
    excerpt = state(page, "excerpt")
    assert excerpt["length_s"] == 3 and page.input_value("#listen-start") == str(excerpt["start_s"]).rstrip("0").rstrip(".")
    page.fill("#out-ceiling", "-2")
    page.press("#out-ceiling", "Tab")
    page.click("#convert-start")
    page.wait_for_selector("#download-file", timeout=90000)
    made = state(page, "conversion")
    assert made["delivery"]["ceiling_dbtp"] == -2 and made["delivery"]["bits"] == "16"
    assert page.get_attribute("#convert-result", "data-stale") == "false"

    # other settings: the result is marked, not silently kept
    page.select_option("#fs-out", "16000")
    page.select_option("#preset", "archival_master")       # states 24 bit: the word length follows
    page.wait_for_function("() => window.rateferry.state.get('delivery').bits === '24'")
    page.wait_for_selector("#result-stale", state="visible")
    assert page.get_attribute("#convert-result", "data-stale") == "true"
    text = page.inner_text("#result-stale")
    assert "target 48\u202fkHz (now 16\u202fkHz)" in text and "word length" in text
    page.locator("#result-view").scroll_into_view_if_needed()
    laptop_shot("21-result-stale", top=False)
    page.evaluate("() => window.rateferry.state.set({excerpt: {start_s: 0, length_s: 4}})")

    # open it from the list: route, mask, delivery and excerpt come back, and the page says so
    page.click(f"#history-list li[data-id='{made['id']}'] button")
    page.wait_for_function("() => window.rateferry.state.get('route').fs_out === 48000")
    route = state(page, "route")
    assert route["preset"] == "spoken_word_delivery" and route["spec"] == {}
    delivery = state(page, "delivery")
    assert delivery["ceiling_dbtp"] == -2 and delivery["bits"] == "16"
    assert state(page, "excerpt") == excerpt
    assert page.input_value("#out-bits") == "16" and page.input_value("#preset") == "spoken_word_delivery"
    note = page.inner_text("#action-note")
    assert note.startswith(f"Opened {made['download_name']}") and "listening excerpt" in note
    page.wait_for_selector("#result-stale", state="hidden")
    assert page.get_attribute("#convert-result", "data-stale") == "false"
    laptop_shot("22-restored")


def test_settings_are_remembered_across_a_reload(laptop, ready):
    page = laptop
    page.select_option("#preset", "music_delivery")
    page.fill("#out-loudness", "-16")
    page.press("#out-loudness", "Tab")
    page.select_option("#fs-out", "96000")
    page.wait_for_timeout(600)                    # the settings are written after a short rest
    page.reload()
    ready(page)
    assert page.input_value("#preset") == "music_delivery"
    assert page.input_value("#out-loudness") == "-16"
    assert page.input_value("#fs-out") == "96000"
    assert "last settings" in page.inner_text("#action-note")


def test_an_extreme_design_is_estimated_and_asked_about_first(laptop, laptop_shot):
    page = laptop
    before = state(page, "design")["id"]
    page.fill("#spec-passband-hz", "21990")
    page.wait_for_selector("#design-estimate", state="visible")
    est = state(page, "designEstimate")
    rate = 44100 * 160
    n_scipy, _ = signal.kaiserord(100.0, (22050 - 21990) / (rate / 2))   # the preset's 100 dB
    assert abs(est["numtaps"] - n_scipy) <= 2 and est["numtaps"] > 100000
    text = page.inner_text("#design-estimate")
    assert "taps" in text and "ms of delay" in text
    laptop_shot("23-extreme-estimate")
    page.click("#design-keep")
    page.wait_for_selector("#design-estimate", state="hidden")
    assert state(page, "design")["id"] == before        # nothing was designed
    # the next edit goes back to an ordinary design at once
    page.fill("#spec-passband-hz", "")
    page.wait_for_function("() => window.rateferry.state.get('design').id !== null && !window.rateferry.state.get('designBusy')")


def test_blind_trial_can_hide_the_answers_until_the_end(laptop, laptop_shot):
    page = laptop
    page.click("#tab-listen")
    page.fill("#listen-length", "3")
    page.click("#listen-prepare")
    page.wait_for_selector("#listen-play:not([disabled])", timeout=60000)
    # the caution reads as two sentences
    caution = page.inner_text("#listen-caution")
    assert caution.startswith("Hearing caution. ") and caution[len("Hearing caution. ")].isupper()
    page.select_option("#blind-count", "6")
    page.check("#blind-hide")
    page.click("#blind-start")
    for i in range(6):
        if i == 3:
            assert page.locator("#blind-list li").count() == 0
            assert "right" not in page.inner_text("#blind-score")
            assert page.get_attribute("#blind-score", "data-correct") is None
        page.click("#blind-answer-a" if i % 2 else "#blind-answer-b")
    items = page.locator("#blind-list li").all_inner_texts()
    assert len(items) == 6
    right = sum(t.endswith("right") for t in items)
    score = page.inner_text("#blind-score")
    assert score.startswith(f"{right} of 6 right")
    expected = stats.binomtest(right, 6, 0.5, alternative="greater").pvalue
    assert float(page.get_attribute("#blind-score", "data-p-value")) == pytest.approx(expected, rel=1e-12)
    # the score is shown once
    assert "right" not in page.inner_text("#blind-trial")
    page.locator("#blind-h").scroll_into_view_if_needed()
    laptop_shot("24-blind-hidden-finished", top=False)


def test_every_demo_recording_is_listed(laptop):
    names = sorted(n for n in os.listdir(os.path.join(SOURCE_ROOT, "demo_media"))
                   if n.endswith((".flac", ".wav")))
    listed = laptop.evaluate("() => [...document.querySelectorAll('#recording-select option')]"
                             ".map((o) => o.textContent)")
    for name in names:
        assert any(t.startswith(f"{name} (demo)") for t in listed), (name, listed)
