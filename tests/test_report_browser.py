"""report.html and history.html in a real browser: headless Chromium (Debian's `chromium` package, installed by
.ci/run) opens the pages from disk.

Layout is measured inside the browser: a copy of the page gets a small script (the pages themselves carry none)
that opens every folded <details>, then records the page's height, where the answer block starts, every element
reaching past the viewport's edges and the sections present; Chromium's --dump-dom prints the result. The widths
are 1400 px (a desktop) and 800 px (a narrow window or a tablet). A screenshot must not be blank and must show
the SVG pictures."""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pooling import cli

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(
        not any(
            p and os.access(p, os.X_OK)
            for p in (shutil.which("chromium"), "/usr/bin/chromium", shutil.which("chromium-browser"))
        ),
        reason="headless Chromium is not installed (apt-get install chromium; .ci/run installs it)",
    ),
]

CHROMIUM = next(
    (
        p
        for p in (shutil.which("chromium"), "/usr/bin/chromium", shutil.which("chromium-browser"))
        if p and os.access(p, os.X_OK)
    ),
    None,
)
# Flags: no sandbox (CI containers run as root), no GPU, and nothing that reaches the network
# (QUIC, background fetches, component updates, sync).
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
    "--disable-extensions",
    "--mute-audio",
]
WIDTHS = (1400, 800)
VERDICT_WITHIN = 900  # px from the top of the page: the answer is on the first screen
RUN = ["--draws", "300", "--warmup", "300", "--max-draws", "300", "--chains", "2", "--quiet"]

MEASURE = """<script>
window.addEventListener('load', function () {
  document.querySelectorAll('details').forEach(function (d) { d.open = true; });
  var W = document.documentElement.clientWidth, over = [];
  document.querySelectorAll('body *').forEach(function (e) {
    var r = e.getBoundingClientRect();
    if (r.width === 0 && r.height === 0) return;
    if (r.right > W + 0.5 || r.left < -0.5)
      over.push(e.tagName + (e.className && e.className.baseVal === undefined ? '.' + e.className : '') + ' ' +
                Math.round(r.left) + '..' + Math.round(r.right) + ' ' + (e.textContent || '').slice(0, 40));
  });
  var v = document.getElementById('verdict');
  var out = {width: W, height: document.documentElement.scrollHeight, over: over.slice(0, 12), n_over: over.length,
             verdict_top: v ? v.getBoundingClientRect().top + window.scrollY : null,
             sections: Array.prototype.map.call(document.querySelectorAll('main > section[id]'),
                                                function (s) { return s.id; }),
             figures: document.querySelectorAll('svg[data-figure]').length};
  var pre = document.createElement('pre'); pre.id = 'measured'; pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


def _chromium(args: list[str], tmp: Path, timeout: int = 180) -> subprocess.CompletedProcess:
    return subprocess.run(
        [CHROMIUM, *FLAGS, f"--user-data-dir={tmp / 'profile'}", *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, "HOME": str(tmp)},
        check=False,
    )


def measure(page: Path, width: int) -> dict:
    """Layout facts of `page` at `width` px with every <details> open (what sticks out, the sections, the figures),
    and with every <details> folded, as a reader first sees it (the height, where the answer starts)."""
    tmp = Path(tempfile.mkdtemp(prefix="pooling-measure-"))
    try:
        text = page.read_text(encoding="utf-8")
        copy = tmp / "page.html"
        copy.write_text(text.replace("</body>", MEASURE + "</body>"), encoding="utf-8")
        proc = _chromium(
            [f"--window-size={width},900", "--virtual-time-budget=10000", "--dump-dom", copy.as_uri()], tmp
        )
        m = re.search(r'<pre id="measured">(.*?)</pre>', proc.stdout, re.DOTALL)
        assert m, f"the page was not measured; chromium said: {proc.stderr[-2000:]}"
        out = json.loads(html.unescape(m.group(1)))
        folded = tmp / "folded.html"
        folded.write_text(
            text.replace("</body>", MEASURE.replace("d.open = true", "d.open = false") + "</body>"), encoding="utf-8"
        )
        proc = _chromium(
            [f"--window-size={width},900", "--virtual-time-budget=10000", "--dump-dom", folded.as_uri()], tmp
        )
        m = re.search(r'<pre id="measured">(.*?)</pre>', proc.stdout, re.DOTALL)
        assert m, f"the page was not measured; chromium said: {proc.stderr[-2000:]}"
        closed = json.loads(html.unescape(m.group(1)))
        out["height_folded"] = closed["height"]
        out["verdict_top"] = closed["verdict_top"]
        return out
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def screenshot(page: Path, width: int, height: int, shot: Path) -> np.ndarray:
    tmp = Path(tempfile.mkdtemp(prefix="pooling-shot-"))
    try:
        proc = _chromium([f"--window-size={width},{height}", f"--screenshot={shot}", page.as_uri()], tmp)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    assert shot.exists(), f"no screenshot; chromium said: {proc.stderr[-2000:]}"
    import matplotlib.image as mpimg

    img = mpimg.imread(shot)[..., :3]  # floats in [0, 1]
    assert img.shape[:2] == (height, width)
    return img


# ---------------------------------------------------------------------------------------------
# runs (invented scenarios: these tests check layout and behaviour, not statistics)


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    d = tmp_path_factory.mktemp("pages")
    rng = np.random.default_rng(14)
    out = {}
    # the demo, with a threshold, a limit and a head-to-head comparison
    code = cli.main(
        [
            "demo",
            "--out",
            str(d / "demo"),
            "--seed",
            "3",
            "--lower-limit",
            "380",
            "--threshold",
            "400",
            "--compare",
            "S01,S02,S12",
            *RUN,
        ]
    )
    assert code in (0, 3)
    out["demo"] = d / "demo" / "report.html"
    # 60 suppliers of uneven size
    rows = []
    for j in range(60):
        theta = rng.normal(410.0, 8.0)
        rows += [(f"V{j + 1:02d}", x) for x in rng.normal(theta, 12.0, int(rng.integers(2, 50)))]
    pd.DataFrame(rows, columns=["supplier", "strength"]).to_csv(d / "sixty.csv", index=False)
    code = cli.main(
        [
            "fit",
            str(d / "sixty.csv"),
            "--group",
            "supplier",
            "--value",
            "strength",
            "--out",
            str(d / "sixty"),
            "--seed",
            "2",
            "--threshold",
            "400",
            "--lower-limit",
            "385",
            *RUN,
        ]
    )
    assert code in (0, 3)
    out["sixty"] = d / "sixty" / "report.html"
    # a round of 16 labs, one far off the others
    rows = []
    for j in range(16):
        bias = rng.normal(0.0, 0.15) + (1.6 if j == 5 else 0.0)
        rows += [(f"Lab {j + 1:02d}", x) for x in rng.normal(5.2 + bias, 0.08, 3)]
    pd.DataFrame(rows, columns=["lab", "lead"]).to_csv(d / "round.csv", index=False)
    code = cli.main(
        [
            "fit",
            str(d / "round.csv"),
            "--group",
            "lab",
            "--value",
            "lead",
            "--out",
            str(d / "round"),
            "--seed",
            "2",
            "--labs",
            "--allowed-bias",
            "0.3",
            *RUN,
        ]
    )
    assert code in (0, 3)
    out["round"] = d / "round" / "report.html"
    # many groups in summary mode, from one row per group
    J = 600
    n = rng.integers(2, 30, J)
    means = rng.normal(50.0, 3.0, J) + rng.normal(0.0, 4.0, J) / np.sqrt(n)
    pd.DataFrame(
        {"store": [f"St{j:05d}" for j in range(J)], "n": n, "mean": means, "sd": np.abs(rng.normal(4.0, 0.5, J))}
    ).to_csv(d / "many.csv", index=False)
    code = cli.main(
        [
            "fit",
            str(d / "many.csv"),
            "--group",
            "store",
            "--size",
            "n",
            "--mean",
            "mean",
            "--sd",
            "sd",
            "--out",
            str(d / "many"),
            "--seed",
            "2",
            "--summary",
            "on",
            "--threshold",
            "52",
            *RUN,
        ]
    )
    assert code in (0, 3)
    out["many"] = d / "many" / "report.html"
    return out


@pytest.fixture(scope="module")
def nights(tmp_path_factory):
    """A store refitted on each of 10 nights; a batch withdrawn before the eighth refit."""
    d = tmp_path_factory.mktemp("nights")
    rng = np.random.default_rng(9)
    store = d / "plant.store"
    for night in range(10):
        rows = []
        for j in range(12):
            if rng.random() < 0.7:
                shift = 3.0 if j == 4 and night > 5 else 0.0
                rows += [(f"M{j + 1:02d}", x) for x in rng.normal(100 + 0.3 * j + shift, 2.0, int(rng.integers(2, 6)))]
        path = d / f"night{night:02d}.csv"
        pd.DataFrame(rows, columns=["machine", "torque"]).to_csv(path, index=False)
        day = f"2024-05-{night + 1:02d}"
        assert (
            cli.main(
                ["ingest", str(store), str(path), "--group", "machine", "--value", "torque", "--at", day, "--quiet"]
            )
            == 0
        )
        if night == 7:
            assert cli.main(["withdraw", str(store), "night03.csv", "--reason", "gauge out of calibration"]) == 0
        code = cli.main(
            [
                "refit",
                str(store),
                "--out",
                str(d / f"run-{day}"),
                "--seed",
                str(night + 1),
                "--half-life",
                "5",
                "--as-of",
                day,
                "--threshold",
                "101",
                "--tau",
                "half-cauchy:5",
                *RUN,
            ]
        )
        assert code in (0, 3)
    assert cli.main(["history", str(store), "--out", str(d / "history.html")]) == 0
    return d


# ---------------------------------------------------------------------------------------------


def test_report_renders_in_headless_chromium(pages, tmp_path):
    page = pages["demo"]
    img = screenshot(page, 1280, 3000, tmp_path / "page.png")
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


@pytest.mark.parametrize("name", ["demo", "sixty", "round", "many"])
def test_the_answer_is_on_the_first_screen_and_nothing_is_wider_than_the_window(pages, name):
    for width in WIDTHS:
        m = measure(pages[name], width)
        assert m["width"] == width
        assert m["verdict_top"] is not None and m["verdict_top"] < VERDICT_WITHIN, (name, width, m["verdict_top"])
        assert m["n_over"] == 0, (name, width, m["over"])


def test_sixty_groups_fit_in_half_the_former_height(pages):
    # Measured before this layout, on the same kind of run (60 suppliers, a threshold and a lower limit,
    # 1400 px): 16,566 px. The folded page must take at most half of that.
    m = measure(pages["sixty"], 1400)
    assert m["height_folded"] <= 16566 / 2, m["height_folded"]


def test_the_sections_follow_the_options(pages):
    demo = measure(pages["demo"], 1400)["sections"]
    assert demo[0] == "verdict" and "labs" not in demo and "changes" not in demo
    assert {"sides", "h2h", "order", "fitcheck"} <= set(demo) and "how" not in demo
    round_ = measure(pages["round"], 1400)["sections"]
    assert "labs" in round_ and "sides" not in round_ and "h2h" not in round_
    many = measure(pages["many"], 1400)["sections"]
    assert "how" in many and "order" not in many and "fitcheck" not in many and "labs" not in many


def test_a_refit_page_opens_with_what_changed(nights):
    page = nights / "run-2024-05-08" / "report.html"
    for width in WIDTHS:
        m = measure(page, width)
        assert m["sections"][:2] == ["changes", "verdict"], m["sections"]
        assert m["verdict_top"] < VERDICT_WITHIN, (width, m["verdict_top"])
        assert m["n_over"] == 0, (width, m["over"])
    text = page.read_text(encoding="utf-8")
    assert "night03.csv (withdrawn)" in text  # the batch withdrawn since the run before
    assert "Older batches count less" in text  # the forgetting weights, with --half-life


def test_the_history_page_renders_for_ten_nights(nights, tmp_path):
    for page in (nights / "history.html", nights / "run-2024-05-10" / "history.html"):
        text = page.read_text(encoding="utf-8")
        assert "<script" not in text.lower()
        assert "10 runs from 2024-05-01 to 2024-05-10" in text
        for width in WIDTHS:
            m = measure(page, width)
            assert m["n_over"] == 0, (width, m["over"])
            # one picture of mu and tau over the nights, and one per machine (12)
            assert m["figures"] == 1 + 12, m["figures"]
    text = (nights / "history.html").read_text(encoding="utf-8")
    assert "withdrawn or replaced night03.csv" in text
    img = screenshot(nights / "history.html", 1400, 2400, tmp_path / "history.png")
    assert float(img.std()) > 0.05
    teal = np.array([0x1F, 0x6F, 0x78]) / 255  # the posterior colour of the intervals
    assert (np.abs(img - teal).max(axis=-1) < 0.12).sum() > 300
