"""The batch panel in a real browser (Playwright + Debian's chromium) at 1280 x 800.

Checked against outside references: each file in the downloaded zip holds
ceil(frames * up / down) frames (the alignment rule in DEVELOPERS.md), with up/down the
reduced ratio from fractions.Fraction (Python's standard library), and reads back through soundfile at the target
rate; the zip is read with the standard library's zipfile.
"""

import io
import math
import os
import zipfile
from fractions import Fraction

import numpy as np
import pytest
import soundfile as sf

from webapp.server import SOURCE_ROOT

ARTIFACTS = os.path.join(SOURCE_ROOT, "test-artifacts")

pytestmark = pytest.mark.browser

FILES = [("talk_a.wav", 22050, 1, 1.0), ("talk_b.wav", 44100, 2, 0.8), ("talk_c.flac", 96000, 1, 0.6)]


def test_batch_panel_converts_several_files_and_offers_one_zip(laptop_page, tmp_path):
    page = laptop_page
    paths, frames = [], {}
    for name, rate, ch, seconds in FILES:
        n = int(rate * seconds)
        t = np.arange(n) / rate
        x = np.repeat((0.2 * np.sin(2 * np.pi * 500 * t))[:, None], ch, axis=1)
        sf.write(tmp_path / name, x, rate, subtype="PCM_16")
        paths.append(str(tmp_path / name))
        frames[name.rsplit(".", 1)[0]] = (n, rate)
    fs_out = page.evaluate("() => window.rateferry.state.get('route').fs_out")
    page.locator("#batch-view").scroll_into_view_if_needed()
    page.set_input_files("#batch-files", paths)
    page.wait_for_function("() => !document.getElementById('batch-start').disabled")
    assert "3 files" in page.inner_text("#batch-summary")
    page.click("#batch-start")
    page.wait_for_selector("#batch-zip", timeout=90000)
    statuses = page.eval_on_selector_all("#batch-table tbody tr", "rows => rows.map(r => r.dataset.status)")
    assert statuses == ["done", "done", "done"]
    assert "Done: 3 files converted" in page.inner_text("#batch-status")
    # the panel fits the 1280 px window: no sideways scrolling
    assert page.evaluate("() => document.documentElement.scrollWidth") <= 1280
    page.locator("#batch-view").scroll_into_view_if_needed()
    os.makedirs(ARTIFACTS, exist_ok=True)
    page.screenshot(path=os.path.join(ARTIFACTS, "batch-panel-done.png"))
    with page.expect_download() as dl:
        page.click("#batch-zip")
    data = open(dl.value.path(), "rb").read()
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        names = zf.namelist()
        assert len(names) == 3
        for name in names:
            stem = name.split("_")[0] + "_" + name.split("_")[1]
            n_in, rate_in = frames[stem]
            y, rate = sf.read(io.BytesIO(zf.read(name)), always_2d=True)
            ratio = Fraction(fs_out, rate_in)
            assert rate == fs_out
            assert y.shape[0] == math.ceil(n_in * ratio.numerator / ratio.denominator)
    # the batch is listed with its zip under the earlier batches, its files in the history
    page.wait_for_selector("#batch-history li[data-status='done']")
    page.uncheck("#history-this")
    for name in names:
        page.wait_for_selector(f"#history-list li .name[title='{name}']")
