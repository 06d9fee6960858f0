"""The QC pages in a real headless Chromium (Debian's chromium, driven by Playwright).

Checks what a reviewer relies on: no console errors, nothing fetched from the
network, every image decodes, the before/after wipe moves when operated with the
mouse and the keyboard, the index sorts when a header is clicked and links to
the subject pages.  Screenshots go to tests/artifacts/.
"""

from __future__ import annotations

import subprocess

import numpy as np
import pytest

from epicorr.report import IndexFailure, index_rows, write_index, write_subject_page

import _report_data as synth
from conftest import require_tool

pytestmark = pytest.mark.browser

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """A small batch: one good subject, one bad with two targets and a failed one, one failure."""
    qc = tmp_path_factory.mktemp("out") / "qc"
    rng = np.random.default_rng(7)
    good = synth.subject(rng, label="01", scale=1.0)
    bad = synth.subject(rng, label="02", scale=3.0, n_targets=2, pair=False)
    bad.failed_targets.append(("task-nback_bold", "sub-02_task-nback_bold.json: "
                               "EffectiveEchoSpacing=58.0: over 10 ms; BIDS wants seconds"))
    rows, fails = [], []
    for s in (good, bad):
        write_subject_page(qc / f"{s.label}.html", s)
        r, f = index_rows(s, href=f"{s.label}.html")
        rows += r
        fails += f
    fails.append(IndexFailure(subject="sub-03", message="sub-03_bold.json: TotalReadoutTime=-1: "
                              "must be a positive, finite number of seconds; fix the sidecar"))
    write_index(qc / "index.html", rows, fails)
    return qc


@pytest.fixture(scope="module")
def browser():
    require_tool(CHROMIUM, why="the QC pages are checked in a real browser (make install-browser)")
    sync_api = pytest.importorskip("playwright.sync_api")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS, headless=True)
        # The system browser really is the one driven (its --version names the same build).
        system = subprocess.run([CHROMIUM, "--version"], capture_output=True, text=True).stdout
        assert b.version in system, (b.version, system)
        yield b
        b.close()


class Page:
    """A page plus everything it logged and requested."""

    def __init__(self, browser, url):
        self.page = browser.new_page(viewport={"width": 1200, "height": 900})
        self.errors: list[str] = []
        self.requests: list[str] = []
        self.page.on("console", lambda m: self.errors.append(m.text) if m.type == "error" else None)
        self.page.on("pageerror", lambda e: self.errors.append(str(e)))
        self.page.on("request", lambda r: self.requests.append(r.url))
        self.page.goto(url)
        self.page.wait_for_load_state("load")

    def check_clean(self, *, images: bool = True):
        assert self.errors == []
        assert all(u.startswith(("file:", "data:")) for u in self.requests), self.requests
        broken = self.page.evaluate(
            "Array.from(document.images).filter(i => !i.complete || i.naturalWidth === 0)"
            ".map(i => i.alt)")
        assert broken == []
        assert (self.page.evaluate("document.images.length") > 0) == images


def test_subject_page_loads_clean_and_wipe_works(browser, site, artifacts_dir):
    pg = Page(browser, (site / "sub-01.html").as_uri())
    page = pg.page
    pg.check_clean()
    assert "not a medical device" in page.inner_text(".caution")
    page.screenshot(path=str(artifacts_dir / "qc-subject-good.png"), full_page=True)

    wipe = page.locator("[data-wipe]").first
    clips = lambda: wipe.locator(".wipe-after").evaluate_all(  # noqa: E731
        "els => els.map(e => getComputedStyle(e).clipPath)")
    assert set(clips()) == {"inset(0px 0px 0px 50%)"}
    stage = wipe.locator(".wipe-stage").first
    stage.scroll_into_view_if_needed()
    shot_split = stage.screenshot()

    # Keyboard on the slider: End moves the boundary to the right edge (before only).
    slider = wipe.locator("input[type=range]")
    slider.focus()
    page.keyboard.press("End")
    assert set(clips()) == {"inset(0px 0px 0px 100%)"}
    assert "before only" in wipe.locator(".wipe-readout").inner_text()
    shot_before = stage.screenshot()
    page.keyboard.press("Home")
    assert set(clips()) == {"inset(0px 0px 0px 0%)"}
    shot_after = stage.screenshot()
    assert len({shot_split, shot_before, shot_after}) == 3  # the picture really changes

    # Mouse: a click a quarter of the way across a panel puts the boundary there in all panels.
    box = stage.bounding_box()
    page.mouse.click(box["x"] + 0.25 * box["width"], box["y"] + 0.5 * box["height"])
    pos = float(wipe.get_attribute("data-position"))
    assert 22 <= pos <= 28
    assert set(clips()) == {f"inset(0px 0px 0px {pos:g}%)"}
    assert float(slider.input_value()) == pos
    # Drag to three quarters.
    page.mouse.move(box["x"] + 0.3 * box["width"], box["y"] + 10)
    page.mouse.down()
    page.mouse.move(box["x"] + 0.75 * box["width"], box["y"] + 10, steps=5)
    page.mouse.up()
    assert 72 <= float(wipe.get_attribute("data-position")) <= 78
    # Buttons.
    wipe.locator("button[data-go='0']").click()
    assert set(clips()) == {"inset(0px 0px 0px 0%)"}
    wipe.locator("button[data-go='50']").click()
    stage.screenshot(path=str(artifacts_dir / "qc-wipe-split.png"))
    page.keyboard.press("Escape")
    pg.check_clean()
    page.close()


def test_bad_subject_page(browser, site, artifacts_dir):
    pg = Page(browser, (site / "sub-02.html").as_uri())
    pg.check_clean()
    page = pg.page
    assert page.locator("section.target").count() == 2
    assert page.locator(".topbar .chip").inner_text().strip().lower() == "problem"
    assert "EffectiveEchoSpacing=58.0" in page.inner_text("#failed")
    # Each target's wipe is independent.
    wipes = page.locator("[data-wipe]")
    wipes.nth(1).locator("button[data-go='100']").click()
    assert wipes.nth(0).get_attribute("data-position") == "50"
    assert wipes.nth(1).get_attribute("data-position") == "100"
    page.screenshot(path=str(artifacts_dir / "qc-subject-bad.png"), full_page=True)
    page.close()


def _column(page, n):
    return page.eval_on_selector_all(
        "#targets tbody tr", f"rows => rows.map(r => r.cells[{n}].textContent.trim())")


def test_index_sorts_and_links(browser, site, artifacts_dir):
    pg = Page(browser, (site / "index.html").as_uri())
    pg.check_clean(images=False)
    page = pg.page
    page.screenshot(path=str(artifacts_dir / "qc-index.png"), full_page=True)
    heads = page.eval_on_selector_all("#targets thead th", "ths => ths.map(t => t.textContent.trim())")
    # Worst first by default.
    assert _column(page, 0) == ["problem", "problem", "look"]
    assert _column(page, 1) == ["sub-02", "sub-02", "sub-01"]
    assert "sub-03" in page.inner_text("#failures") and "TotalReadoutTime=-1" in page.inner_text("#failures")

    page.click("#targets thead th:nth-child(2) button")  # Subject, ascending
    assert _column(page, 1) == ["sub-01", "sub-02", "sub-02"]
    assert page.get_attribute("#targets thead th:nth-child(2)", "aria-sort") == "ascending"
    page.click("#targets thead th:nth-child(2) button")  # again: descending
    assert _column(page, 1) == ["sub-02", "sub-02", "sub-01"]

    # A numeric column sorts by value (largest first on the first click), blanks last.
    col = heads.index("Field |p99| (Hz)")
    page.click(f"#targets thead th:nth-child({col + 1}) button")
    vals = [float(v.split()[0]) for v in _column(page, col)]
    assert vals == sorted(vals, reverse=True) and vals[0] > vals[-1]
    page.click(f"#targets thead th:nth-child({col + 1}) button")
    vals = [float(v.split()[0]) for v in _column(page, col)]
    assert vals == sorted(vals)
    col = heads.index("Pair r after")  # only sub-01 has a pair: its value first, then blanks
    page.click(f"#targets thead th:nth-child({col + 1}) button")
    assert _column(page, col)[1:] == ["—", "—"] and _column(page, col)[0] != "—"
    page.click(f"#targets thead th:nth-child({col + 1}) button")
    assert _column(page, col)[1:] == ["—", "—"]
    page.screenshot(path=str(artifacts_dir / "qc-index-sorted.png"), full_page=True)

    # The link opens the subject page at its target.
    page.click("#targets tbody tr:has-text('sub-01') a")
    page.wait_for_load_state("load")
    assert page.url.endswith("sub-01.html#target-0")
    assert page.title().startswith("sub-01")
    assert pg.errors == []
    page.close()
