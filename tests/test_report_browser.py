"""The report in a real headless browser: it renders, leads with the answer, and fits the page.

Chromium from the system packages (`.ci/run` installs Debian's ``chromium`` when missing); the test
skips only where no Chromium can be found. The page is opened from a file with the network, sync,
updates and the first-run dialogs off and a fresh profile; a screenshot is taken, and a copy of the
page with a small probe script added reports layout facts through the DOM (``--dump-dom``).
"""

from __future__ import annotations

import html
import json
import re
import shutil
import struct
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pytest

from widescreen.report import build_report
from widescreen.store import DatasetWriter
from widescreen.workflow import IterateConfig, run

from .conftest import write_outcome

WIDTH, HEIGHT = 1280, 2400


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _browse(page: Path, *mode: str) -> subprocess.CompletedProcess:
    exe = _chromium()
    with tempfile.TemporaryDirectory() as profile:
        return subprocess.run(
            [
                exe,
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-quic",
                "--no-first-run",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
                "--hide-scrollbars",
                f"--user-data-dir={profile}",
                f"--window-size={WIDTH},{HEIGHT}",
                *mode,
                page.resolve().as_uri(),
            ],
            capture_output=True,
            text=True,
            timeout=180,
            check=False,
        )


# Layout facts, measured by the browser after load and written into the DOM.
PROBE = """<script>
(function () {
  const top = (sel) => { const e = document.querySelector(sel); return e ? e.getBoundingClientRect().top : null; };
  const imgs = Array.from(document.images);
  const cells = Array.from(document.querySelectorAll("#tables td"));
  const heights = cells.map((c) => c.getBoundingClientRect().height).sort((a, b) => a - b);
  const tables = Array.from(document.querySelectorAll("#tables table")).map((t) => ({
    width: t.getBoundingClientRect().width, room: t.parentElement.clientWidth }));
  const its = document.evaluate("//h3[text()='Iterations']/following-sibling::div[1]/table",
    document, null, XPathResult.FIRST_ORDERED_NODE_TYPE, null).singleNodeValue;
  document.body.setAttribute("data-facts", JSON.stringify({
    pageWidth: document.documentElement.scrollWidth, viewport: window.innerWidth,
    images: imgs.length, decoded: imgs.filter((i) => i.complete && i.naturalWidth > 0).length,
    alts: imgs.map((i) => i.getAttribute("alt") || ""),
    summary: top("#summary"), pictures: top("#pictures"), tables: top("#tables"),
    details: top("#details"),
    cellMedian: heights[Math.floor(heights.length / 2)], cellMax: heights[heights.length - 1],
    iterations: its ? { width: its.getBoundingClientRect().width,
                        room: its.parentElement.clientWidth } : null,
    tablesFit: tables.every((t) => t.width <= t.room + 1),
  }));
})();
</script>"""


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    """A finished run with covariates on an annotated store; two ids hold a dollar sign."""
    root = tmp_path_factory.mktemp("browser")
    rng = np.random.default_rng(3)
    n, p = 200, 600
    ids = [f"p{i}" for i in range(n)]
    X = rng.binomial(2, rng.uniform(0.1, 0.5, p), size=(n, p)).astype(np.int8)
    feats = [f"rs{j}" for j in range(p)]
    feats[40], feats[410] = "rs$40$", "chr2:41000_A$T"  # would be mathtext without care
    chrom = np.repeat(["1", "2", "X"], [300, 250, 50])
    pos = np.concatenate([np.arange(1, 301), np.arange(1, 251), np.arange(1, 51)]) * 1000
    w = DatasetWriter(
        root / "s.zarr", ids, "dosage", "int8", n_features=p, chunks=(n, 128), annotations=True
    )
    w.append(X, feats, chrom, pos)
    w.finalize()
    age = rng.normal(40, 8, n)
    y = 1.0 * X[:, 40] - 0.9 * X[:, 410] + 0.7 * X[:, 120] + 0.02 * age + rng.normal(size=n)
    write_outcome(root / "o.tsv", ids, {"y": y.tolist(), "age": age.tolist()})
    cfg = IterateConfig(response="y", covariates=("age",), shortlist=15, max_iter=3)
    run(root / "s.zarr", root / "o.tsv", cfg, root / "run")
    return build_report(root / "run")


@pytest.mark.skipif(_chromium() is None, reason="no Chromium here (.ci/run installs it)")
def test_the_report_renders_in_a_headless_browser(report, tmp_path):
    shot = tmp_path / "report.png"
    res = _browse(report, f"--screenshot={shot}")
    assert shot.is_file(), res.stderr[-2000:]
    data = shot.read_bytes()
    # The PNG specification: 8-byte signature, then the IHDR chunk with width and height.
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert struct.unpack(">II", data[16:24]) == (WIDTH, HEIGHT)
    assert len(data) > 100_000  # a page with pictures, not a blank canvas
    keep = Path(tempfile.gettempdir()) / "widescreen-report-screenshot.png"
    shutil.copyfile(shot, keep)  # for a person to look at

    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text().replace("</body>", PROBE + "</body>"))
    res = _browse(probe, "--dump-dom")
    found = re.search(r'data-facts="([^"]*)"', res.stdout)
    assert found, res.stderr[-2000:]
    facts = json.loads(html.unescape(found.group(1)))
    assert facts["pageWidth"] <= facts["viewport"]  # nothing sticks out sideways
    assert facts["images"] >= 5 and facts["decoded"] == facts["images"]
    assert all(len(a) > 20 for a in facts["alts"])  # every picture says what it shows
    # The answer first: summary, then pictures, then the long tables, then the details.
    assert facts["summary"] < facts["pictures"] < facts["tables"] < facts["details"]
    # Numbers do not wrap: every table cell is one line high.
    assert facts["cellMax"] < 1.5 * facts["cellMedian"]
    assert facts["iterations"] is not None
    assert facts["iterations"]["width"] <= facts["iterations"]["room"]
    assert facts["tablesFit"]  # with the empty and redundant columns left out, every table fits
    page = report.read_text()
    assert "rs$40$" in page  # the ids as they are, in the text
