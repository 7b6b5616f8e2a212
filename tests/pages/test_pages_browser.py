"""The history pages in a real browser: filtering, sorting, following links, charts loading,
no console errors; served by monitor.pages.serve over HTTP and opened straight from disk.

Drives Debian's chromium (/usr/bin/chromium) through Playwright; Playwright's own browser
download is never used. Without chromium the tests skip with the reason, except under CI
(``CI=true``), where a missing browser is a failure. Screenshots of the index and of a pair
page are saved in ``test-artefacts/`` at the repository root.

The site under test comes from the `built_site` fixture, parametrised over `SITE_BUILDERS`:
add a builder there (for instance one that runs a synthetic backfill through the pipeline)
and every test here runs against that site too.
"""

from __future__ import annotations

import os
import re
import threading
import xml.etree.ElementTree as ET
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pytest

from monitor.pages.serve import make_server, server_url
from monitor.pages.write import build_site
from tests.pages.test_pages import made_up_context

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--no-first-run", "--disable-quic", "--disable-sync",
]
ARTEFACTS = Path(__file__).resolve().parents[2] / "test-artefacts"
UNDER_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


@dataclass(frozen=True)
class BuiltSite:
    """A built site and what the tests expect of it.

    Attributes
    ----------
    folder : Path
        The site's folder.
    query : str
        Text typed into the alert filter.
    matching : frozenset of str
        Ids of the alerts whose rows must stay visible for `query` (all others hidden).
    """

    folder: Path
    query: str
    matching: frozenset[str]


def _made_up_site(folder: Path) -> BuiltSite:
    ctx = made_up_context()
    build_site(ctx, folder)
    matching = frozenset(
        str(a.id) for a in ctx.alerts
        if a.target_kind == "pair" and set(a.target) == {"KLV", "DUNQ"}
    )
    return BuiltSite(folder, "KLV/DUNQ", matching)


def _backfill_site(folder: Path) -> BuiltSite:
    """The site the pipeline builds after a backfill of the planted-break desk."""
    import datetime as dt

    from monitor.config import load_settings
    from monitor.demo.synthetic import generate
    from monitor.pipeline import build_pages, evaluate_range, ingest_file, init_store
    from storage import alerts as alerts_store
    from tests.scenarios import INSTRUMENTS, RULES, break_scenario

    desk = folder.parent / f"{folder.name}-desk"
    desk.mkdir()
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    closes.to_csv(desk / "closes.csv", date_format="%Y-%m-%d")
    # A second watched pair, so that filtering on KLV/DUNQ has rows to hide.
    bond_watch = ('\n[[rules]]\nname = "bond-watch"\nkind = "level"\nmeasure = "rolling:21"'
                  '\npairs = ["KLV/TEZ10"]\nabove = -0.5\nclear = -0.6\n')
    (desk / "comove.toml").write_text('[store]\nurl = "sqlite:///store.sqlite"\n'
                                      + INSTRUMENTS + RULES + bond_watch)
    settings = load_settings(desk / "comove.toml")
    store = init_store(settings)
    ingest_file(store, settings, desk / "closes.csv", today=dt.date(2024, 1, 5))
    evaluate_range(store, settings, None, None)
    build_pages(store, settings, folder)
    with store.connect() as conn:
        matching = frozenset(str(a.id) for a in alerts_store.list_alerts(conn)
                             if a.target == "KLV/DUNQ")
    store.dispose()
    assert matching, "the planted break must have raised alerts"
    return BuiltSite(folder, "KLV/DUNQ", matching)


SITE_BUILDERS: dict[str, Callable[[Path], BuiltSite]] = {
    "made-up": _made_up_site,
    "synthetic-backfill": _backfill_site,
}
"""Ways to build the site under test, by name; each test runs once per builder."""


@pytest.fixture(scope="module", params=sorted(SITE_BUILDERS))
def built_site(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
               ) -> BuiltSite:
    folder = tmp_path_factory.mktemp(f"site-{request.param}")
    return SITE_BUILDERS[request.param](folder)


@pytest.fixture(scope="module")
def site_url(built_site: BuiltSite) -> Iterator[str]:
    server = make_server(built_site.folder)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05},
                              daemon=True)
    thread.start()
    try:
        yield server_url(server)
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    if not CHROMIUM.exists():
        reason = f"{CHROMIUM} is not installed (apt-get install chromium)"
        if UNDER_CI:
            pytest.fail(f"{reason}; the browser tests must run under CI")
        pytest.skip(reason)
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        launched = playwright.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            yield launched
        finally:
            launched.close()


@dataclass
class Tab:
    """A browser page and every console error or uncaught exception it produced."""

    page: Any
    errors: list[str]


@pytest.fixture
def tab(browser: Any) -> Iterator[Tab]:
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    page = context.new_page()
    errors: list[str] = []
    page.on("console", lambda m: errors.append(f"console: {m.text}") if m.type == "error"
            else None)
    page.on("pageerror", lambda e: errors.append(f"page error: {e}"))
    try:
        yield Tab(page, errors)
    finally:
        context.close()


def _row_ids(page: Any, visible_only: bool) -> list[str]:
    script = (
        "rows => rows.filter(r => !r.hidden && r.offsetParent !== null)"
        ".map(r => r.dataset.alert)" if visible_only else "rows => rows.map(r => r.dataset.alert)"
    )
    return list(page.eval_on_selector_all("#alert-table tbody tr", script))


def _type_filter(page: Any, text: str) -> None:
    page.wait_for_selector("#alert-filter", state="visible")
    page.fill("#filter-q", text)


def _screenshot(page: Any, name: str) -> None:
    ARTEFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTEFACTS / name), full_page=True, timeout=20_000)


def test_filter_sort_and_follow_a_pair_over_http_without_console_errors(
    built_site: BuiltSite, site_url: str, tab: Tab
) -> None:
    page = tab.page
    page.goto(site_url + "index.html")
    every = _row_ids(page, visible_only=False)
    assert len(every) > len(built_site.matching) > 0

    _type_filter(page, built_site.query)
    assert set(_row_ids(page, visible_only=True)) == built_site.matching
    assert page.inner_text("#filter-count") == \
        f"Showing {len(built_site.matching)} of {len(every)} alerts"
    assert "#q=" in page.url  # the filter is written back so the view can be linked

    _type_filter(page, "")
    assert _row_ids(page, visible_only=True) == every
    opened_header = page.locator("#alert-table thead th", has_text="Opened")
    opened_header.locator("button").click()
    assert opened_header.get_attribute("aria-sort") == "ascending"
    ascending = _row_ids(page, visible_only=False)
    assert ascending != every and sorted(ascending) == sorted(every)
    dates = page.eval_on_selector_all("#alert-table tbody tr",
                                      "rows => rows.map(r => r.cells[6].textContent.trim())")
    assert dates == sorted(dates)
    opened_header.locator("button").click()
    assert opened_header.get_attribute("aria-sort") == "descending"
    _screenshot(page, "pages-index.png")

    _type_filter(page, built_site.query)
    link = page.locator("#alert-table tbody tr:not([hidden]) td.target a").first
    link.click()
    page.wait_for_load_state("load")
    assert "/pairs/" in page.url
    page.wait_for_function(
        "() => { const images = [...document.querySelectorAll('section.measure img')];"
        " return images.length > 0 && images.every(i => i.complete && i.naturalWidth > 0); }"
    )
    assert page.locator("section.measure img").count() > 0
    assert page.locator("#event-table tbody tr").count() > 0
    _screenshot(page, "pages-pair.png")
    assert tab.errors == []


def test_a_filter_in_the_address_opens_a_filtered_view(
    built_site: BuiltSite, site_url: str, tab: Tab
) -> None:
    page = tab.page
    page.goto(site_url + "index.html#q=" + quote(built_site.query, safe=""))
    page.wait_for_selector("#alert-filter", state="visible")
    assert set(_row_ids(page, visible_only=True)) == built_site.matching
    assert page.input_value("#filter-q") == built_site.query

    page.goto(site_url + "index.html?state=open")
    page.wait_for_selector("#alert-filter", state="visible")
    open_ids = page.eval_on_selector_all(
        "#alert-table tbody tr[data-state='open']", "rows => rows.map(r => r.dataset.alert)")
    assert open_ids and _row_ids(page, visible_only=True) == open_ids
    assert page.input_value("#filter-state") == "open"
    assert tab.errors == []


def test_index_opened_from_disk_filters_and_sorts_too(built_site: BuiltSite, tab: Tab) -> None:
    page = tab.page
    page.goto((built_site.folder / "index.html").resolve().as_uri())
    every = _row_ids(page, visible_only=False)
    _type_filter(page, built_site.query)
    assert set(_row_ids(page, visible_only=True)) == built_site.matching
    _type_filter(page, "")
    page.locator("#alert-table thead th", has_text="Peak").locator("button").click()
    assert _row_ids(page, visible_only=False) != every
    assert tab.errors == []


# --- charts, links and the acknowledge command ----------------------------------------

_DATE_LABEL = re.compile(r"\d{4}|[A-Z][a-z]{2}( \d\d| \d{4})?")


def test_every_link_and_chart_of_the_pair_pages_resolves(
    built_site: BuiltSite, site_url: str, tab: Tab
) -> None:
    """Each pair page's links answer 200 (with the anchor they name on the page they
    reach), its charts load, and each chart carries date labels from the shared axis."""
    page = tab.page
    pair_pages = sorted((built_site.folder / "pairs").glob("*.html"))
    assert pair_pages
    checked: set[str] = set()
    charts = 0
    for path in pair_pages[:4]:
        page.goto(site_url + path.relative_to(built_site.folder).as_posix())
        page.wait_for_function(
            "() => { const images = [...document.querySelectorAll('section.measure img')];"
            " return images.every(i => i.complete && i.naturalWidth > 0); }"
        )
        for href in page.eval_on_selector_all("a[href]", "as => as.map(a => a.href)"):
            if not href.startswith(site_url) or href in checked:
                continue
            checked.add(href)
            address, _, fragment = href.partition("#")
            response = page.request.get(address)
            assert response.status == 200, href
            if fragment and "=" not in fragment:  # "#rule=..." is a filter, not an anchor
                assert f'id="{fragment}"' in response.text(), href
        for source in page.eval_on_selector_all("section.measure img", "is => is.map(i => i.src)"):
            svg = page.request.get(source)
            assert svg.status == 200 and svg.headers["content-type"].startswith("image/svg")
            texts = [e.text or "" for e in ET.fromstring(svg.body()).iter()
                     if e.tag.endswith("text")]
            assert sum(bool(_DATE_LABEL.fullmatch(t)) for t in texts) >= 2, texts
            charts += 1
    assert checked and charts
    assert tab.errors == []


@contextmanager
def _served(folder: Path) -> Iterator[str]:
    server = make_server(folder)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05},
                              daemon=True)
    thread.start()
    try:
        yield server_url(server)
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)


def test_copy_button_puts_the_exact_ack_command_on_the_clipboard(
    browser: Any, tmp_path: Path
) -> None:
    ctx = made_up_context()
    waiting = [a for a in ctx.alerts if a.state == "open" and not a.acknowledged_by]
    assert waiting, "the made-up desk has an open alert nobody acknowledged"
    build_site(ctx, tmp_path / "site")
    pages = [p for p in (tmp_path / "site").rglob("*.html") if "ack-command" in p.read_text()]
    assert pages
    with _served(tmp_path / "site") as url:
        context = browser.new_context(permissions=["clipboard-read", "clipboard-write"])
        try:
            page = context.new_page()
            page.goto(url + pages[0].relative_to(tmp_path / "site").as_posix())
            code = page.locator("code.ack-command").first
            command = code.inner_text()
            assert command.startswith("comove ack ") and command.endswith('--by "$USER"')
            button = page.locator("button.copy").first
            assert button.is_visible()  # shown by site.js
            button.click()
            page.wait_for_function("() => document.querySelector('button.copy')"
                                   ".dataset.copied === 'yes'")
            assert page.evaluate("navigator.clipboard.readText()") == command
            assert button.inner_text() == "Copied"
        finally:
            context.close()
