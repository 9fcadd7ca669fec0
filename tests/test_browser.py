"""The HTML report in a real browser: Debian's chromium, driven headless by Playwright.

No browser is downloaded: Playwright's Python package is pointed at ``/usr/bin/chromium``.
Without it the test is skipped, unless ``KKTRACE_REQUIRE_BROWSER=1`` (set by CI), in which
case it fails.
"""

from __future__ import annotations

import csv
import os
import warnings
from pathlib import Path

import numpy as np
import pytest

from solver import api
from solver.reporting import write_report
from solver.store import RunStore

CHROMIUM = Path("/usr/bin/chromium")
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
EVIL = "<script>alert(1)</script>"

pytestmark = pytest.mark.browser


def _require_browser() -> None:
    required = os.environ.get("KKTRACE_REQUIRE_BROWSER") == "1"
    missing = None
    if not CHROMIUM.exists():
        missing = f"{CHROMIUM} is not installed"
    else:
        try:
            import playwright.sync_api  # noqa: F401
        except ImportError:
            missing = "the playwright Python package is not installed"
    if missing:
        if required:
            pytest.fail(f"KKTRACE_REQUIRE_BROWSER=1 but {missing}")
        pytest.skip(missing)


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> Path:
    _require_browser()
    root = tmp_path_factory.mktemp("browser")
    g = np.random.default_rng(11)
    X = g.normal(size=(200, 2))
    lab = np.where(X[:, 0] * X[:, 1] + 0.3 * g.normal(size=200) > 0, "pass", "fail")
    for name, rows in (("train.csv", slice(0, 150)), ("hold.csv", slice(150, 200))):
        with open(root / name, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow([EVIL, "width", "verdict"])
            for row, y in zip(X[rows], lab[rows], strict=True):
                w.writerow([f"{row[0]:.5f}", f"{row[1]:.5f}", y])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = api.train(str(root / "train.csv"), label="verdict", solver="both",
                        holdout=str(root / "hold.csv"), store=str(root / "store"), C=5.0)
    st = RunStore(root / "store")
    recs = [st.load(i) for i in out.run_ids]
    paths = write_report(recs, root / "out", formats=("html",), notes=f"notes with {EVIL}")
    return paths["html"]


def test_report_renders_in_chromium(report: Path, tmp_path: Path) -> None:
    from playwright.sync_api import sync_playwright

    url = report.resolve().as_uri()
    console_errors: list[str] = []
    page_errors: list[str] = []
    requests: list[str] = []
    dialogs: list[str] = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        try:
            page = browser.new_page(viewport={"width": 1100, "height": 1400})
            page.on("console", lambda m: console_errors.append(m.text)
                    if m.type == "error" else None)
            page.on("pageerror", lambda e: page_errors.append(str(e)))
            page.on("request", lambda r: requests.append(r.url))
            page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            page.goto(url, wait_until="load")
            page.wait_for_load_state("networkidle")

            assert console_errors == [] and page_errors == []
            assert requests == [url]  # the file itself, nothing fetched
            assert dialogs == []  # no script ran
            assert page.evaluate("document.scripts.length") == 0

            # every figure is drawn with a non-zero size
            sizes = page.evaluate(
                "Array.from(document.querySelectorAll('figure svg')).map(s => {"
                " const r = s.getBoundingClientRect(); return [r.width, r.height]; })")
            n_fig = page.evaluate("document.querySelectorAll('figure').length")
            assert n_fig >= 8 and len(sizes) == n_fig
            assert all(w > 100 and h > 50 for w, h in sizes), sizes
            # SVG content really rendered: each figure has drawn paths with a size
            drawn = page.evaluate(
                "Array.from(document.querySelectorAll('figure svg')).map(s =>"
                " Array.from(s.querySelectorAll('path')).some(p => {"
                " const b = p.getBBox(); return b.width > 0 && b.height > 0; }))")
            assert all(drawn)

            # the script-tag column name is shown as text, escaped, in tables and figures
            body_text = page.evaluate("document.body.innerText")
            assert EVIL in body_text
            svg_text = page.evaluate(
                "Array.from(document.querySelectorAll('svg text')).map(t => t.textContent)"
                ".join('\\n')")
            assert EVIL in svg_text
            assert page.evaluate("document.querySelectorAll('script').length") == 0

            page.screenshot(path=str(tmp_path / "report.png"), full_page=True)
            page.emulate_media(media="print")
            assert page.evaluate(
                "getComputedStyle(document.querySelector('nav.contents')).display") == "none"
            page.screenshot(path=str(tmp_path / "report-print.png"), full_page=True)
            shot = os.environ.get("KKTRACE_SCREENSHOT_DIR")
            if shot:  # keep a copy for a person to look at
                Path(shot).mkdir(parents=True, exist_ok=True)
                page.emulate_media(media="screen")
                page.screenshot(path=str(Path(shot) / "report.png"), full_page=True)
        finally:
            browser.close()
    assert (tmp_path / "report.png").stat().st_size > 10_000
    assert dialogs == [] and console_errors == [] and page_errors == []
