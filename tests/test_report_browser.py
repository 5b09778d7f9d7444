"""report.html in a real browser: headless Chromium (Debian's `chromium` package, installed by
.ci/run) opens the page from disk and takes a screenshot, which must not be blank."""
from __future__ import annotations

import os
import shutil
import subprocess

import numpy as np
import pytest

from pooling import cli

pytestmark = pytest.mark.browser

CHROMIUM = next((p for p in (shutil.which("chromium"), "/usr/bin/chromium", shutil.which("chromium-browser"))
                 if p and os.access(p, os.X_OK)), None)
# Flags: no sandbox (CI containers run as root), no GPU, and nothing that reaches the network
# (QUIC, background fetches, component updates, sync).
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--disable-extensions", "--mute-audio"]


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed (apt-get install chromium; "
                                             ".ci/run installs it)")
def test_report_renders_in_headless_chromium(tmp_path):
    out = tmp_path / "run"
    code = cli.main(["demo", "--out", str(out), "--quiet", "--draws", "400", "--warmup", "300", "--max-draws", "400",
                     "--seed", "3", "--lower-limit", "380", "--threshold", "400", "--compare", "S01,S02,S12"])
    assert code in (0, 3)
    shot = tmp_path / "page.png"
    cmd = [CHROMIUM, *FLAGS, f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1280,6000",
           f"--screenshot={shot}", (out / "report.html").as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120, env={**os.environ, "HOME": str(tmp_path)})
    assert shot.exists(), f"no screenshot; chromium said: {proc.stderr[-2000:]}"

    import matplotlib.image as mpimg

    img = mpimg.imread(shot)[..., :3]  # floats in [0, 1]
    assert img.shape[:2] == (6000, 1280)
    # Not blank: a blank page is one colour. Common practice: require real variation in the pixels
    # and a good share of them differing from the page background.
    assert float(img.std()) > 0.05
    background = np.median(img.reshape(-1, 3), axis=0)
    differs = np.abs(img - background).max(axis=-1) > 0.08
    assert differs.mean() > 0.05
    # The SVG pictures were drawn: the pooled-mean line colour (#5a3d8a) is used by the figures
    # only, never by the page's own CSS, so its pixels can only come from rendered SVG.
    purple = np.array([0x5A, 0x3D, 0x8A]) / 255
    near = np.abs(img - purple).max(axis=-1) < 0.12
    assert near.sum() > 300, near.sum()
