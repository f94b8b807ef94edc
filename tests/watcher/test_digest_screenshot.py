"""The HTML digest rendered by a real browser (headless Chromium) at phone and desktop widths.

Layout checks of our own page (no published values apply): the page renders, the
screenshots have the asked width, and the phone rendering is not blank.  Skipped
where no Chromium binary is installed.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]


def _script():
    spec = importlib.util.spec_from_file_location("screenshot_digest", ROOT / "bench" / "screenshot_digest.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_digest_renders_in_chromium(tmp_path):
    shot = _script()
    browser = shot.find_chromium()
    if browser is None:
        pytest.skip("no chromium binary on PATH (Debian: apt-get install chromium)")
    from PIL import Image

    html_path = shot.sample_digest(tmp_path)
    for w, h in ((390, 2000), (1280, 2000)):
        png = tmp_path / f"shot-{w}.png"
        shot.screenshot(html_path, png, w, h, browser)
        im = Image.open(png).convert("L")
        assert im.size == (w, h)
        a = np.asarray(im, dtype=float)
        # the page is drawn: dark header, light background, chart lines -- far from one flat colour
        assert a.std() > 20
        # nothing runs off the right edge at phone width: the right-most 4 px column is page background
        if w == 390:
            edge = a[:, -4:]
            assert (edge > 200).mean() > 0.9
