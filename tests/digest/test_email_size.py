"""The digest email stays under `[digest] max_email_bytes` and says what it left out.

`fit_email` leaves out the charts of the last alerts shown, then shows fewer alerts in
full, until the message (as the real MIME bytes, parsed back) is within the limit; the
"Shortened:" line of the HTML and text parts names what is missing and where it is. Long
acknowledged and cleared lists are summarised like the new and still-open ones.

The context is the seeded synthetic desk of `monitor.bench.digest_speed` (made up).
"""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime
from email import message_from_bytes
from email.message import EmailMessage
from email.policy import default

import pytest
from bs4 import BeautifulSoup

from monitor.bench.digest_speed import synthetic_context
from monitor.digest import RenderedDigest, build_message, fit_email, render_digest
from monitor.templating import SCREENFUL

pytestmark = pytest.mark.slow


def _build(rendered: RenderedDigest) -> EmailMessage:
    return build_message(rendered, sender="digest@made-up.invalid",
                         recipients=["desk@made-up.invalid"],
                         date=datetime(2026, 3, 5, 18, 31, tzinfo=UTC))


def _parts(raw: bytes) -> tuple[str, str, int]:
    """(html, text, number of PNG parts) of the real message."""
    parsed = message_from_bytes(raw, policy=default)
    html = text = ""
    images = 0
    for part in parsed.walk():
        kind = part.get_content_type()
        if kind == "text/html":
            html = part.get_content()
        elif kind == "text/plain":
            text = part.get_content()
        elif kind == "image/png":
            images += 1
    return html, text, images


@pytest.fixture(scope="module")
def context():  # type: ignore[no-untyped-def]
    return synthetic_context(instruments=40, groups=2, new_alerts=30)


def test_a_digest_within_the_limit_is_left_whole(context) -> None:  # type: ignore[no-untyped-def]
    fitted = fit_email(context, _build, 50_000_000)
    assert fitted.fits and fitted.charts_left_out == 0 and fitted.limit == SCREENFUL
    html, text, images = _parts(fitted.message.as_bytes())
    # 25 new alerts charted, plus the group averages and the two heatmaps.
    assert fitted.charts == SCREENFUL
    soup = BeautifulSoup(html, "html.parser")
    assert soup.select_one("p.shortened") is not None  # 30 new alerts: 5 summarised
    assert "Shortened: not shown in full: 5 of 30 new alerts" in text
    assert "chart" not in soup.select_one("p.shortened").get_text()


def test_charts_are_left_out_to_keep_the_email_under_the_limit(context) -> None:  # type: ignore[no-untyped-def]
    whole = fit_email(context, _build, 50_000_000)
    full_size = whole.size
    limit = full_size - 300_000
    fitted = fit_email(context, _build, limit)
    raw = fitted.message.as_bytes()
    assert fitted.fits and len(raw) <= limit < full_size
    assert 0 < fitted.charts < SCREENFUL and fitted.charts_left_out == SCREENFUL - fitted.charts
    html, text, images = _parts(raw)
    _, _, whole_images = _parts(whole.message.as_bytes())
    assert images == whole_images - fitted.charts_left_out
    line = BeautifulSoup(html, "html.parser").select_one("p.shortened").get_text(" ")
    n = fitted.charts_left_out
    assert f"{n} charts left out to keep the email under {limit / 1e6:.1f} MB" in line
    assert "history pages (index.html)" in line
    assert f"{n} charts left out" in text
    # The cards are all still there; only their charts went.
    cards = BeautifulSoup(html, "html.parser").select("#new-alerts table.alert")
    assert len(cards) == SCREENFUL


def test_fewer_cards_when_charts_are_not_enough(context) -> None:  # type: ignore[no-untyped-def]
    no_charts = render_digest(context, charts=0)
    floor = len(_build(render_digest(context, limit=1, charts=0)).as_bytes())
    limit = (len(_build(no_charts).as_bytes()) + floor) // 2
    fitted = fit_email(context, _build, limit)
    assert fitted.fits and fitted.charts == 0 and 1 <= fitted.limit < SCREENFUL
    html, _, _ = _parts(fitted.message.as_bytes())
    cards = BeautifulSoup(html, "html.parser").select("#new-alerts table.alert")
    assert len(cards) == fitted.limit
    # Below the smallest digest it cannot fit: returned as it is, never dropped.
    tiny = 100_000
    smallest = len(_build(render_digest(context, limit=1, charts=0,
                                        max_email_bytes=tiny)).as_bytes())
    assert tiny < smallest
    stuck = fit_email(context, _build, tiny)
    assert not stuck.fits and stuck.limit == 1 and stuck.size == smallest


def test_long_cleared_and_acknowledged_lists_are_summarised(context) -> None:  # type: ignore[no-untyped-def]
    many = replace(context, cleared=[replace(a, id=9000 + k) for k in range(40)
                                     for a in context.cleared[:1]],
                   acknowledged=[replace(a, id=8000 + k) for k in range(30)
                                 for a in context.acknowledged[:1]])
    rendered = render_digest(many)
    soup = BeautifulSoup(rendered.html_for_files, "html.parser")
    assert len(soup.select("#cleared-today tr.alert-row, #cleared-today table.alert")) <= 40
    assert soup.select_one("#cleared-today-summary .more").get_text() == "and 15 more"
    assert soup.select_one("#acknowledged-summary .more").get_text() == "and 5 more"
    assert len(soup.select("#acknowledged table.acknowledged-list tr.alert-row")) == SCREENFUL
    line = soup.select_one("p.shortened").get_text(" ")
    assert "5 of 30 acknowledged" in line and "15 of 40 cleared today" in line
    assert "15 of 40 cleared today" in rendered.text
