"""The HTML report in a real browser (Debian's chromium driven by playwright), offline.

Checks: no console errors or page errors, every image decodes (naturalWidth > 0), nothing is
fetched from outside the file, and markup in labels stays inert text.  The launch flags are
the ones the project's toolchain notes give for headless chromium on these machines.
"""
from __future__ import annotations

import shutil
import tempfile

import pytest

from trialcut.report.document import build_document
from trialcut.report.render import render_html

pytestmark = pytest.mark.browser

CHROMIUM = shutil.which("chromium")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]


@pytest.fixture(scope="module")
def browser():
    if CHROMIUM is None:
        pytest.skip("chromium is not on PATH (CI installs Debian's chromium package)")
    sync_api = pytest.importorskip("playwright.sync_api")
    profile = tempfile.mkdtemp(prefix="trialcut-chromium-")
    with sync_api.sync_playwright() as playwright:
        # A fresh profile folder per run (playwright takes it as an argument, not a flag).
        context = playwright.chromium.launch_persistent_context(
            profile, executable_path=CHROMIUM, headless=True, args=FLAGS,
            viewport={"width": 1200, "height": 900})
        yield context
        context.close()
    shutil.rmtree(profile, ignore_errors=True)


def open_report(browser, html: str, folder, screenshot_name: str):
    """Load ``html`` from a file; returns (page, problems) with every error and outside request."""
    path = folder / "report.html"
    path.write_text(html, encoding="utf-8")
    page = browser.new_page()
    problems = {"console": [], "page": [], "outside": [], "dialogs": []}
    page.on("console", lambda m: problems["console"].append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: problems["page"].append(str(e)))

    def dialog(d):
        problems["dialogs"].append(d.message)
        d.dismiss()

    page.on("dialog", dialog)

    def route(r):
        url = r.request.url
        if url.startswith(("file:", "data:")):
            r.continue_()
        else:
            problems["outside"].append(url)
            r.abort()

    page.route("**/*", route)
    page.goto(path.as_uri(), wait_until="load")
    page.screenshot(path=str(folder / screenshot_name), full_page=False)
    return page, problems


def test_report_loads_cleanly_offline(browser, report_fixtures, tmp_path):
    results = report_fixtures.build_results(unlocked=True)
    page, problems = open_report(browser, render_html(build_document(results)), tmp_path, "report.png")
    images = page.eval_on_selector_all("img", "els => els.map(e => [e.complete, e.naturalWidth, e.alt])")
    assert images, "the report has figures"
    assert all(complete and width > 0 and alt for complete, width, alt in images), images
    assert problems == {"console": [], "page": [], "outside": [], "dialogs": []}
    # The banner of an unlocked run is on screen at the top of the page.
    assert page.locator(".banner").get_by_text("UNLOCKED PLAN", exact=False).is_visible()
    assert (tmp_path / "report.png").stat().st_size > 0
    page.close()


def test_markup_in_labels_stays_text(browser, report_fixtures, tmp_path):
    results = report_fixtures.with_hostile_text(report_fixtures.build_results())
    page, problems = open_report(browser, render_html(build_document(results)), tmp_path, "hostile.png")
    assert problems["dialogs"] == [] and problems["page"] == []
    assert page.eval_on_selector_all("script", "els => els.length") == 0
    shown = page.get_by_text("<script>alert(1)</script> study", exact=False).first
    assert shown.is_visible()
    page.close()


def test_cover_breaks_no_word_in_the_middle_at_a_narrow_width(browser, report_fixtures, tmp_path):
    # Issue 9: the cover broke a word across two lines.  In a 480-pixel window every cover fact that
    # is made of words must keep each word on one line (only a long hash may break where it must).
    page, _ = open_report(browser, render_html(build_document(report_fixtures.build_results())), tmp_path,
                          "cover.png")
    page.set_viewport_size({"width": 480, "height": 900})
    broken = page.eval_on_selector_all(".facts dd", """els => els.flatMap(dd => {
        const out = [];
        const walker = document.createTreeWalker(dd, NodeFilter.SHOW_TEXT);
        for (let node = walker.nextNode(); node; node = walker.nextNode()) {
            // Pieces of words: a line may end after a hyphen, as in any text, but not inside a piece.
            const words = node.textContent.matchAll(/[^\\s-]+-?/g);
            for (const word of words) {
                if (word[0].length > 40) continue;            // a hash: allowed to break
                const range = document.createRange();
                range.setStart(node, word.index);
                range.setEnd(node, word.index + word[0].length);
                if (range.getClientRects().length > 1) out.push(word[0]);
            }
        }
        return out;
    })""")
    assert broken == []
    page.close()
