"""The digest in a real browser at a phone's width (390 CSS pixels) and on a desk screen:
on the phone nothing runs off the side, an alert's figures stack as "label: value" lines,
wide tables scroll inside their own box and pictures fit; on the desk the tables stay
tables. Drives Debian's chromium through Playwright like tests/pages/test_pages_browser.py.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from monitor.digest import render_digest
from monitor.digest.context import CrossMatrixView
from tests.digest.test_digest_render import _context
from tests.pages import test_pages_browser

pytestmark = pytest.mark.browser

# The chromium fixtures of the browser tests (Debian's /usr/bin/chromium, never a download).
browser = test_pages_browser.browser

PHONE = {"width": 390, "height": 844}
DESK = {"width": 1280, "height": 900}


@pytest.fixture(scope="module")
def digest_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    cross = CrossMatrixView("Kelvara credit", "Tezlin rates", ("KLV", "DUNQ", "ORMA"),
                            ("TEZ10", "TEZ20", "TEZ30", "TEZ40", "TEZ50", "TEZ60"),
                            np.array([[0.61, -0.2, 0.1, 0.2, 0.3, math.nan]] * 3),
                            rules=("credit-hedge",))
    ctx = _context(cross_matrices=[cross], pages_url="https://risk.halden.example/comove/")
    ctx = replace(ctx, new_alerts=[replace(a, page=f"pairs/p-{a.id}.html#alert-{a.id}")
                                   for a in ctx.new_alerts])
    rendered = render_digest(ctx)
    folder = tmp_path_factory.mktemp("digest")
    (folder / "digest.html").write_text(rendered.html_for_files, encoding="utf-8")
    for image in rendered.images:
        (folder / image.filename).write_bytes(image.png)
    return folder / "digest.html"


def _open(browser: Any, viewport: dict[str, int], path: Path) -> Any:
    context = browser.new_context(viewport=viewport)
    page = context.new_page()
    page.goto(path.as_uri())
    page.wait_for_load_state("load")
    return context, page


def test_at_390_px_nothing_runs_off_the_side_and_figures_stack(
    browser: Any, digest_file: Path
) -> None:
    context, page = _open(browser, PHONE, digest_file)
    try:
        assert page.evaluate("document.documentElement.scrollWidth") <= PHONE["width"]
        # Every element ends inside the screen, except inside a box that scrolls itself.
        outside = page.evaluate("""() => Array.from(document.querySelectorAll('body *'))
            .filter(e => !e.closest('div.scroll'))
            .filter(e => e.getBoundingClientRect().right > window.innerWidth + 0.5)
            .map(e => e.tagName + '.' + e.className)""")
        assert outside == []
        images = page.eval_on_selector_all(
            "img", "imgs => imgs.map(i => [i.complete && i.naturalWidth > 0, "
                   "i.getBoundingClientRect().right])")
        assert images and all(loaded and right <= PHONE["width"] for loaded, right in images)
        # An alert's figures: the header row is hidden, each value says what it is.
        assert not page.locator("table.alert-figures thead").first.is_visible()
        label = page.evaluate("""() => getComputedStyle(
            document.querySelector('table.alert-figures td.value'), '::before').content""")
        assert label == '"Value: "'
        lines = page.eval_on_selector_all(
            "table.alert-figures", "ts => ts.map(t => t.querySelector('td.band')"
                                   ".getBoundingClientRect().top - t.querySelector('td.value')"
                                   ".getBoundingClientRect().top)")
        assert all(gap > 0 for gap in lines)  # band below value: stacked, not side by side
        # Wide tables scroll in their own box; the page stays put.
        boxes = page.eval_on_selector_all(
            "div.scroll", "ds => ds.map(d => [d.scrollWidth, d.clientWidth, "
                          "getComputedStyle(d).overflowX])")
        assert boxes and all(overflow == "auto" for _, _, overflow in boxes)
        assert any(scroll > client for scroll, client, _ in boxes)
        smallest = page.evaluate("""() => Math.min(...Array.from(document.querySelectorAll(
            'td, th, p, div')).filter(e => e.innerText.trim()).map(e =>
            parseFloat(getComputedStyle(e).fontSize)))""")
        assert smallest >= 12
        test_pages_browser.ARTEFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(test_pages_browser.ARTEFACTS / "digest-390.png"),
                        full_page=True, timeout=20_000)
    finally:
        context.close()


def test_on_a_desk_screen_the_figures_stay_a_table(browser: Any, digest_file: Path) -> None:
    context, page = _open(browser, DESK, digest_file)
    try:
        assert page.locator("table.alert-figures thead").first.is_visible()
        tops = page.evaluate("""() => { const t = document.querySelector('table.alert-figures');
            return [t.querySelector('td.value').getBoundingClientRect().top,
                    t.querySelector('td.band').getBoundingClientRect().top]; }""")
        assert tops[0] == tops[1]  # side by side on one row
        label = page.evaluate("""() => getComputedStyle(
            document.querySelector('table.alert-figures td.value'), '::before').content""")
        assert label in ("none", "normal")
    finally:
        context.close()


def test_links_in_the_digest_lead_to_the_pages_address(browser: Any, digest_file: Path) -> None:
    context, page = _open(browser, PHONE, digest_file)
    try:
        hrefs = page.eval_on_selector_all("a.pair-link", "as => as.map(a => a.href)")
        assert hrefs and all(h.startswith("https://risk.halden.example/comove/pairs/")
                             for h in hrefs)
    finally:
        context.close()
