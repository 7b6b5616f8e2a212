"""Alert floods stay readable, and each statistical alert says what stands behind it.

A day that opens hundreds of alerts shows the strongest ones in full and a summary by rule
and group ("and N more") in the digest's HTML and text, with charts for the shown alerts
only, so the email stays within a stated size; the history pages summarise such a day in
one line per rule with a link to the index filtered to that rule and day (checked in
chromium too). Rules with a stated variance and false-alarm setting (shift) carry their
method note to the digest and the pages; level rules carry none.

All data is simulated (seeded numpy) or made up for the test.
"""

from __future__ import annotations

import math
import threading
from collections import Counter
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd
import pytest
from bs4 import BeautifulSoup, Tag

from monitor.digest import AlertFacts, DigestInputs, build_context, build_message
from monitor.digest.context import (
    SEVERITY_RANK,
    AlertHistory,
    AlertView,
    DigestContext,
    DigestParameters,
    Instrument,
)
from monitor.digest.flood import NO_GROUP, SCREENFUL, group_label, pages_filter, summarise
from monitor.digest.order import alert_sort_key
from monitor.digest.render import render_digest
from monitor.digest.rendered import RenderedDigest
from monitor.pages import SiteInputs, build_site_context
from monitor.pages import views as page_views
from monitor.pages.context import AlertSummary, RulePage, SiteContext, SiteParameters
from monitor.pages.paths import pair_page_path, rule_page_path
from monitor.pages.render import render_pages
from monitor.pages.serve import make_server, server_url
from monitor.pages.write import build_site
from monitor.rules import build_rules
from monitor.templating import format_corr, format_date
from storage.alerts import AlertRow
from tests.pages import test_pages_browser

AS_OF = date(2026, 3, 5)
FLOOD = 300
"""New alerts on the flooded day."""

GROUPS: dict[str, tuple[str, ...]] = {
    "Rates": tuple(f"RT{k:02d}" for k in range(10)),
    "Utilities": tuple(f"UT{k:02d}" for k in range(10)),
    "Industrials": tuple(f"IN{k:02d}" for k in range(10)),
}
GROUP_OF = {s: g for g, members in GROUPS.items() for s in members}
SYMBOLS = [s for members in GROUPS.values() for s in members]

# (name, kind, level or None, method note or "")
RULES = (
    ("hedge-level", "level", 0.6, ""),
    ("sign-watch", "level", 0.0, ""),
    ("regime-shift", "shift", None,
     "robust variance (made up for the test); threshold |z| > 3.94 for 0.01 false alerts "
     "per pair per year"),
)

EMAIL_OVERHEAD_BOUND = 2_000
"""Bytes the summary may add to the email besides its rows (heading, note, link line)."""
EMAIL_ROW_BOUND = 1_600
"""Bytes one row of the table by rule and group may add to the email: HTML with inline
styles plus its text line, after the MIME transfer encoding (measured about 1,400)."""


def _history() -> AlertHistory:
    # One history for every alert: the charts then differ by title only, so the size
    # comparison measures the summary, not the data.
    rng = np.random.default_rng(5)
    days = [AS_OF - timedelta(days=119 - i) for i in range(120)]
    values = np.clip(0.5 + np.cumsum(rng.normal(0, 0.02, 120)), -0.95, 0.95)
    return AlertHistory(days, values, values - 0.1, values + 0.1)


HISTORY = _history()


def flood_alerts(count: int, seed: int = 12) -> list[AlertView]:
    """`count` new alerts over three rules and every group (and pairs across groups)."""
    rng = np.random.default_rng(seed)
    alerts = []
    for k in range(count):
        name, kind, level, note = RULES[int(rng.integers(len(RULES)))]
        a, b = rng.choice(len(SYMBOLS), size=2, replace=False)
        sa, sb = SYMBOLS[int(a)], SYMBOLS[int(b)]
        severity = ("critical", "warning", "info")[int(rng.choice(3, p=[0.05, 0.6, 0.35]))]
        groups = tuple(g for g in GROUPS if g in (GROUP_OF[sa], GROUP_OF[sb]))
        if kind == "shift":
            value, p_value, alert_level = float(rng.uniform(-0.5, 0.9)), \
                float(10 ** -rng.uniform(2, 8)), None
        else:
            assert level is not None
            value, p_value, alert_level = level - float(rng.uniform(0.0, 0.4)), None, level
        alerts.append(AlertView(
            id=1000 + k, severity=severity,  # type: ignore[arg-type]
            rule_name=name, rule_kind=kind, a=Instrument(sa, f"Made-up {sa}"),
            b=Instrument(sb, f"Made-up {sb}"), measure="rolling:63", value=value,
            band_low=value - 0.1, band_high=value + 0.1, days_held=1, opened=AS_OF,
            state="new", level=alert_level,
            clear_level=None if alert_level is None else alert_level + 0.1,
            direction="" if alert_level is None else "below", p_value=p_value,
            z=None if p_value is None else 4.2, baseline=None if p_value is None else 0.3,
            history=HISTORY, observations=63.0, groups=groups, method_note=note,
        ))
    return alerts


def flood_context(new: list[AlertView], continuing: list[AlertView] | None = None,
                  pages_url: str = "") -> DigestContext:
    return DigestContext(
        desk="Made-up Rates Desk", as_of=AS_OF, data_through=AS_OF,
        generated_at=datetime(2026, 3, 5, 18, 30, tzinfo=UTC),
        parameters=DigestParameters(("rolling:63",), (63.0,), "log"), version="0.1.0",
        new_alerts=new, continuing=continuing or [], pages_url=pages_url,
    )


def strongest_first(alert: AlertView) -> tuple[Any, ...]:
    """The digest's documented order, written out again: severity, then shift alerts by
    p-value, then level alerts by how far past their level, then pair and id."""
    p = alert.p_value if alert.p_value is not None else math.inf
    excess = abs(alert.value - alert.level) if alert.level is not None else math.nan
    return (SEVERITY_RANK[alert.severity], p, -excess if math.isfinite(excess) else math.inf,
            alert.a.symbol, alert.b.symbol, str(alert.id))


@pytest.fixture(scope="module")
def flood() -> list[AlertView]:
    return flood_alerts(FLOOD)


@pytest.fixture(scope="module")
def rendered_flood(flood: list[AlertView]) -> RenderedDigest:
    return render_digest(flood_context(flood))


@pytest.fixture(scope="module")
def flood_soup(rendered_flood: RenderedDigest) -> BeautifulSoup:
    return BeautifulSoup(rendered_flood.html_for_files, "html.parser")


def _section(soup: BeautifulSoup, section_id: str) -> Tag:
    found = soup.find(id=section_id)
    assert isinstance(found, Tag), section_id
    return found


def test_a_flooded_day_shows_only_a_screenful_of_cards_the_strongest_first(
    flood: list[AlertView], flood_soup: BeautifulSoup
) -> None:
    cards = _section(flood_soup, "new-alerts").select("table.alert")
    assert len(cards) == SCREENFUL < FLOOD
    expected = sorted(flood, key=strongest_first)[:SCREENFUL]
    assert [int(c["data-alert-id"]) for c in cards] == [a.id for a in expected]
    # Every critical alert of the day outranks the rest, so all of them are shown.
    critical = {a.id for a in flood if a.severity == "critical"}
    assert 0 < len(critical) < SCREENFUL
    assert critical <= {int(c["data-alert-id"]) for c in cards}


def test_the_summary_counts_every_alert_by_rule_and_group_with_its_strongest(
    flood: list[AlertView], flood_soup: BeautifulSoup
) -> None:
    new = _section(flood_soup, "new-alerts")
    more = new.select_one(".flood-summary .more")
    assert more is not None
    assert more.get_text(strip=True) == f"and {FLOOD - SCREENFUL} more"
    assert new.find("h3", string="By rule and group") is not None
    rows = new.select("table.flood-table tbody tr")
    shown = {(r["data-rule"], r["data-group"]): int(r.select_one("td.count").get_text())
             for r in rows}
    counts = Counter(
        (a.rule_name, " / ".join(a.groups) if a.groups else NO_GROUP) for a in flood)
    assert shown == dict(counts)
    assert sum(shown.values()) == FLOOD
    ordered = sorted(flood, key=strongest_first)
    for row in rows:
        key = (row["data-rule"], row["data-group"])
        best = next(a for a in ordered if (a.rule_name, group_label(a)) == key)
        assert best.pair in row.select_one("td.strongest").get_text(" ", strip=True)
        assert row.select_one("td.value").get_text(strip=True) == format_corr(best.value)
    # Rows come strongest first: each row's strongest alert ranks before the next row's.
    firsts = [next(a for a in ordered if (a.rule_name, group_label(a)) ==
                   (r["data-rule"], r["data-group"])) for r in rows]
    assert firsts == sorted(firsts, key=strongest_first)


def test_without_a_pages_address_the_digest_names_the_filtered_index(
    flood_soup: BeautifulSoup, rendered_flood: RenderedDigest
) -> None:
    line = _section(flood_soup, "new-alerts").select_one(".flood-summary .full-list")
    assert line is not None
    text = line.get_text(" ", strip=True)
    assert "see the history pages" in text
    for name, _, _, _ in RULES:
        assert pages_filter(name, opened=AS_OF) in text
    assert line.find("a") is None  # nothing to link to without an address
    assert "index.html#rule=regime-shift&opened=2026-03-05" in rendered_flood.text


def test_with_a_pages_address_the_digest_links_the_full_list(flood: list[AlertView]) -> None:
    rendered = render_digest(flood_context(flood[:SCREENFUL + 1],
                                           pages_url="https://risk.example/pages/"))
    soup = BeautifulSoup(rendered.html_for_email, "html.parser")
    links = [a["href"] for a in soup.select("#new-alerts .full-list a")]
    rules = dict.fromkeys(a.rule_name for a in sorted(flood[:SCREENFUL + 1],
                                                      key=strongest_first))
    assert links == [f"https://risk.example/pages/{pages_filter(r, opened=AS_OF)}"
                     for r in rules]
    assert _section(soup, "new-alerts").select_one(".more").get_text(strip=True) \
        == "and 1 more"


def test_a_day_within_the_screenful_lists_everything_without_a_summary(
    flood: list[AlertView]
) -> None:
    rendered = render_digest(flood_context(flood[:SCREENFUL]))
    soup = BeautifulSoup(rendered.html_for_files, "html.parser")
    assert len(soup.select("#new-alerts table.alert")) == SCREENFUL
    assert soup.select(".flood-summary") == []
    assert "more (" not in rendered.text and "By rule and group" not in rendered.text


def test_the_text_part_carries_the_same_summary(
    flood: list[AlertView], rendered_flood: RenderedDigest
) -> None:
    text = rendered_flood.text
    new_part = text.split("NEW ALERTS", 1)[1].split("STILL OPEN", 1)[0]
    cards = [line for line in new_part.splitlines() if line.startswith("[")]
    assert len(cards) == SCREENFUL
    assert f"and {FLOOD - SCREENFUL} more ({FLOOD} in this list" in new_part
    assert "By rule and group:" in new_part
    counts = Counter((a.rule_name, group_label(a)) for a in flood)
    table = new_part.split("By rule and group:", 1)[1]
    for (rule, group), count in counts.items():
        assert any(line.split()[:len(rule.split()) + len(group.split()) + 1]
                   == [*rule.split(), *group.split(), str(count)]
                   for line in table.splitlines()), (rule, group, count)


def test_charts_are_drawn_for_the_shown_cards_only(rendered_flood: RenderedDigest) -> None:
    alert_charts = [i for i in rendered_flood.images if i.filename.startswith("alert-")]
    assert len(alert_charts) == SCREENFUL


def test_the_still_open_list_is_summarised_too(flood: list[AlertView]) -> None:
    open_alerts = [AlertView(**{**a.__dict__, "state": "continuing", "history": None,
                                "opened": AS_OF - timedelta(days=3)}) for a in flood[:80]]
    rendered = render_digest(flood_context([], open_alerts))
    soup = BeautifulSoup(rendered.html_for_files, "html.parser")
    section = _section(soup, "still-open")
    assert len(section.select("tr.alert-row")) == SCREENFUL
    assert section.select_one(".more").get_text(strip=True) == f"and {80 - SCREENFUL} more"
    total = sum(int(td.get_text()) for td in section.select("table.flood-table td.count"))
    assert total == 80
    assert pages_filter("regime-shift", state="open") in section.get_text(" ", strip=True)
    still = rendered.text.split("STILL OPEN", 1)[1].split("ACKNOWLEDGED", 1)[0]
    assert f"and {80 - SCREENFUL} more" in still


def _email_bytes(rendered: RenderedDigest) -> int:
    message = build_message(rendered, sender="comove@desk.example",
                            recipients=["risk@desk.example"],
                            date=datetime(2026, 3, 5, 18, 30, tzinfo=UTC))
    return len(message.as_bytes())


@pytest.mark.slow
def test_the_email_does_not_grow_with_the_flood() -> None:
    """Bound: the email of a flooded day is at most the email of a day with exactly a
    screenful of alerts (no summary) plus EMAIL_OVERHEAD_BOUND plus EMAIL_ROW_BOUND per
    row of the table by rule and group (at most rules x groups rows, whatever N is)."""
    sizes: dict[int, int] = {}
    rows: dict[int, int] = {}
    for count in (SCREENFUL, FLOOD, 4 * FLOOD):
        alerts = flood_alerts(count)
        # The same strongest screenful in every case, so the cards and charts match and
        # only the summary differs: the flood's extra alerts are all weaker.
        base = flood_alerts(SCREENFUL)
        # (A finite p-value outranks any level alert of the same severity, so the weaker
        # copies of shift alerts carry none: otherwise they push level alerts out of the
        # screenful and the charts differ.)
        weaker = [AlertView(**{**a.__dict__, "id": 10_000 + k, "severity": "info",
                               "p_value": None, "z": None, "baseline": None,
                               "value": a.value if a.level is None else a.level - 0.001})
                  for k, a in enumerate(alerts[SCREENFUL:])]
        shown = summarise(sorted(base + weaker, key=alert_sort_key), opened=AS_OF).shown
        assert {a.id for a in shown} == {a.id for a in base}
        rendered = render_digest(flood_context(base + weaker))
        sizes[count] = _email_bytes(rendered)
        rows[count] = len(summarise(sorted(base + weaker, key=strongest_first)).rows)
    max_rows = len(RULES) * (len(GROUPS) + 3)  # 3 groups and 3 pairs of groups
    assert rows[FLOOD] <= max_rows and rows[4 * FLOOD] <= max_rows
    for count in (FLOOD, 4 * FLOOD):
        bound = sizes[SCREENFUL] + EMAIL_OVERHEAD_BOUND + EMAIL_ROW_BOUND * rows[count]
        assert sizes[count] <= bound, (count, sizes, rows)
    # Four times the flood changes the email by well under 1 % (other strongest pairs).
    assert abs(sizes[4 * FLOOD] - sizes[FLOOD]) <= 0.01 * sizes[FLOOD]


# --- method notes through the real rules -------------------------------------------


SHIFT_TABLE = {"name": "regime-shift", "kind": "shift", "measure": "rolling:21",
               "baseline": "rolling:126", "pairs": ["RT00/RT01"], "severity": "critical"}
LEVEL_TABLE = {"name": "hedge-level", "kind": "level", "measure": "rolling:21",
               "pairs": ["RT00/UT00"], "below": 0.3, "clear": 0.45}


def _returns(days: int = 300) -> pd.DataFrame:
    rng = np.random.default_rng(3)
    index = pd.bdate_range(end=pd.Timestamp(AS_OF), periods=days)
    return pd.DataFrame(rng.normal(0, 0.01, (days, len(SYMBOLS))), index=index,
                        columns=SYMBOLS)


@pytest.fixture(scope="module")
def real_rules() -> list[Any]:
    return build_rules([SHIFT_TABLE, LEVEL_TABLE], symbols=SYMBOLS, groups=GROUPS)


def test_method_notes_reach_the_digest_for_a_shift_alert_and_not_a_level_alert(
    real_rules: list[Any]
) -> None:
    shift, level = real_rules
    assert shift.method_note() and level.method_note() is None
    returns = _returns()
    day = returns.index[-1].date()
    facts = [
        AlertFacts(id=1, rule="regime-shift", target="RT00/RT01", opened_on=day,
                   first_breach_on=day, state="open", cleared_on=None, severity="warning",
                   rule_kind="shift", announced=True,
                   event_today={"value": 0.7, "z": 4.4, "p": 1e-5, "reference": 0.1}),
        AlertFacts(id=2, rule="hedge-level", target="RT00/UT00", opened_on=day,
                   first_breach_on=day, state="open", cleared_on=None, severity="warning",
                   rule_kind="level", announced=True),
    ]
    inputs = DigestInputs(
        desk="Made-up Rates Desk", as_of=day, generated_at=datetime(2026, 3, 5, 18, tzinfo=UTC),
        returns=returns, names={}, groups=GROUPS,
        rules={r.name: r for r in real_rules}, alerts=facts,
        monitored_pairs=np.array([[0, 1], [0, SYMBOLS.index("UT00")]]), measures=["rolling:21"],
        return_kind="log", horizon=1, level=0.95, largest_changes_days=5, group_average_days=21,
        history_days=60,
    )
    ctx = build_context(inputs)
    by_id = {a.id: a for a in ctx.new_alerts}
    assert by_id[1].method_note == shift.method_note()
    assert by_id[1].groups == ("Rates",) and by_id[2].groups == ("Rates", "Utilities")
    assert by_id[2].method_note == ""
    rendered = render_digest(ctx)
    soup = BeautifulSoup(rendered.html_for_files, "html.parser")
    cards = {int(c["data-alert-id"]): c for c in soup.select("#new-alerts table.alert")}
    note = cards[1].select_one(".method-note")
    assert note is not None and shift.method_note() in note.get_text(" ", strip=True)
    assert cards[2].select_one(".method-note") is None
    about = soup.select("#about tr.method-note-row")
    assert [r["data-rule"] for r in about] == ["regime-shift"]
    assert "What stands behind each rule's alerts" in rendered.text
    new_part = rendered.text.split("NEW ALERTS", 1)[1].split("STILL OPEN", 1)[0]
    cards = ["\n".join(card) for card in _text_cards(new_part)]
    shift_card = next(c for c in cards if "regime-shift" in c)
    level_card = next(c for c in cards if "hedge-level" in c)
    assert "Tested:" in shift_card and "Tested:" not in level_card


def test_an_alert_acknowledged_and_cleared_the_same_evening_is_listed_as_cleared_only(
    real_rules: list[Any]
) -> None:
    returns = _returns()
    day = returns.index[-1].date()
    facts = [AlertFacts(id=7, rule="hedge-level", target="RT00/UT00", opened_on=day,
                        first_breach_on=day, state="cleared", cleared_on=day,
                        severity="warning", rule_kind="level", announced=True,
                        acknowledged_by="r.vell", acknowledged_at=datetime(2026, 3, 5, 17,
                                                                          tzinfo=UTC))]
    inputs = DigestInputs(
        desk="Made-up Rates Desk", as_of=day, generated_at=datetime(2026, 3, 5, 18, tzinfo=UTC),
        returns=returns, names={}, groups=GROUPS,
        rules={r.name: r for r in real_rules}, alerts=facts,
        monitored_pairs=np.array([[0, SYMBOLS.index("UT00")]]), measures=["rolling:21"],
        return_kind="log", horizon=1, level=0.95, largest_changes_days=5, group_average_days=21,
        history_days=60,
    )
    ctx = build_context(inputs)
    assert [a.id for a in ctx.new_alerts] == [] and [a.id for a in ctx.cleared] == [7]
    text = render_digest(ctx).text
    assert "hedge-level" not in text.split("NEW ALERTS", 1)[1].split("STILL OPEN", 1)[0]


def _text_cards(part: str) -> list[list[str]]:
    """The text part's alert cards: each starts with a "[SEVERITY]" line."""
    cards: list[list[str]] = []
    for line in part.splitlines():
        if line.startswith("["):
            cards.append([line])
        elif cards and line.startswith("  "):
            cards[-1].append(line)
    return cards


def _alert_row(alert_id: int, rule: str, kind: str, target: str, opened: date,
               value: float, level: float | None) -> AlertRow:
    return AlertRow(id=alert_id, rule=rule, target=target, opened_on=opened,
                    first_breach_on=opened, rule_kind=kind, severity="warning",
                    measure="rolling:21", state="open", cleared_on=None, level=level,
                    opened_value=value, peak_value=value, peak_on=opened, last_value=value,
                    last_on=opened, announced=True)


def test_method_notes_reach_the_rule_page_and_the_pair_page(real_rules: list[Any]) -> None:
    shift, _ = real_rules
    returns = _returns(200)
    day = returns.index[-1].date()
    alerts = [_alert_row(1, "regime-shift", "shift", "RT00/RT01", day, 0.7, None),
              _alert_row(2, "hedge-level", "level", "RT00/UT00", day, 0.2, 0.3)]
    events = [{"alert_id": 1, "date": day, "event": "opened", "value": 0.7, "level": None,
               "low": 0.5, "high": 0.8, "p": 2e-6, "n": 21, "z": 4.6},
              {"alert_id": 2, "date": day, "event": "opened", "value": 0.2, "level": 0.3,
               "low": 0.0, "high": 0.4, "p": None, "n": 21, "z": None}]
    inputs = SiteInputs(
        desk="Made-up Rates Desk", generated_at=datetime(2026, 3, 5, 18, tzinfo=UTC),
        returns=returns, names={}, groups=GROUPS, rules=real_rules,
        rule_tables=[SHIFT_TABLE, LEVEL_TABLE], alerts=alerts, events=events,
        acknowledgements=[], runs=[], digests=[], measures=["rolling:21"],
        return_kind="log", level=0.95,
    )
    ctx = build_site_context(inputs)
    summaries = {a.id: a for a in ctx.alerts}
    assert summaries[1].p_value == pytest.approx(2e-6) and math.isnan(summaries[1].excess)
    assert summaries[2].p_value is None and summaries[2].excess == pytest.approx(0.1)
    pages, _ = render_pages(ctx)

    def page(path: str) -> BeautifulSoup:
        return BeautifulSoup(pages[path].decode("utf-8"), "html.parser")

    shift_page = page(rule_page_path("regime-shift"))
    note = shift_page.select_one("#rule-method")
    assert note is not None and shift.method_note() in note.get_text(" ", strip=True)
    assert page(rule_page_path("hedge-level")).select_one("#rule-method") is None
    # Measure and Severity are listed once (not again among the table's own keys), and the
    # two measures are joined with "vs" since a comma separates a measure's options.
    settings = [(row.th.get_text(strip=True), row.td.get_text(" ", strip=True))
                for row in shift_page.select("#rule-settings tr")]
    names = [name for name, _ in settings]
    assert names.count("Measure") == 1 and names.count("Severity") == 1
    assert "measure" not in names and "severity" not in names
    assert dict(settings)["Measure"] == f"{shift.measure} vs {shift.baseline}"
    assert dict(settings)["baseline"] == "rolling:126"
    pair = page(pair_page_path("RT00", "RT01"))
    notes = [dd.get_text(" ", strip=True) for dd in pair.select("dl.method-notes dd")]
    assert notes == [shift.method_note()]
    assert page(pair_page_path("RT00", "UT00")).select("dl.method-notes") == []


# --- the pages ----------------------------------------------------------------------


PAGES_DAYS = [AS_OF - timedelta(days=k) for k in (0, 1, 7)]


def flood_site() -> SiteContext:
    """300 alerts of one rule on AS_OF, a few of it and another rule on other days."""
    rng = np.random.default_rng(21)
    alerts = []
    pairs = [(a, b) for i, a in enumerate(SYMBOLS) for b in SYMBOLS[i + 1:]]
    for k in range(FLOOD):
        a, b = pairs[k]
        alerts.append(AlertSummary(
            id=5000 + k, state="open", severity="critical" if k % 50 == 7 else "warning",
            rule_name="regime-shift", rule_kind="shift", target_kind="pair", target=(a, b),
            opened=AS_OF, peak=float(rng.uniform(-0.5, 0.9)), measure="rolling:21",
            p_value=float(10 ** -rng.uniform(2, 8)),
        ))
    for k in range(12):  # a quiet day for the same rule, and another rule on the flood day
        a, b = pairs[FLOOD + k]
        alerts.append(AlertSummary(
            id=6000 + k, state="cleared", severity="info", rule_name="regime-shift" if k < 6
            else "hedge-level", rule_kind="shift" if k < 6 else "level", target_kind="pair",
            target=(a, b), opened=PAGES_DAYS[2] if k < 6 else AS_OF,
            cleared=AS_OF, peak=0.2, measure="rolling:21", excess=0.05))
    return SiteContext(
        desk="Made-up Rates Desk", generated_at=datetime(2026, 3, 5, 19, tzinfo=UTC),
        data_through=AS_OF, version="0.1.0",
        parameters=SiteParameters(("rolling:21",), "log", 0.95), alerts=alerts,
        rules=[RulePage("regime-shift", "shift", "warning", "rolling:21",
                        method_note="made-up note for the test"),
               RulePage("hedge-level", "level", "warning", "rolling:21")],
        groups=GROUP_OF,
    )


def test_pages_and_digest_summarise_at_the_same_size() -> None:
    # One constant (monitor.templating.SCREENFUL) serves both.
    assert page_views.SCREENFUL is SCREENFUL == 25


def test_the_index_and_the_rule_page_summarise_a_flooded_day_with_a_filtered_link() -> None:
    ctx = flood_site()
    pages, _ = render_pages(ctx)
    index = BeautifulSoup(pages["index.html"].decode("utf-8"), "html.parser")
    days = index.select("li.flood-day")
    assert len(days) == 1  # the quiet day (6 alerts) and the other rule (6) are not
    line = days[0]
    assert line["data-rule"] == "regime-shift" and line["data-count"] == str(FLOOD)
    text = line.get_text(" ", strip=True)
    assert text.startswith(f"{FLOOD} alerts opened on {format_date(AS_OF)} by rule")
    assert f"and {FLOOD - page_views.FLOOD_STRONGEST} more" in text
    flood = [a for a in ctx.alerts if a.opened == AS_OF and a.rule_name == "regime-shift"]
    strongest = sorted(flood, key=lambda a: (a.severity != "critical", a.p_value))[
        :page_views.FLOOD_STRONGEST]
    named = [a.get_text() for a in line.find_all("a") if "flood-link" not in a.get("class", [])]
    assert named == [a.target_label for a in strongest]
    link = line.select_one("a.flood-link")
    assert link is not None
    assert link["href"] == "index.html#rule=regime-shift&opened=2026-03-05"
    # Every row carries the day the filter compares with.
    rows = index.select("#alert-table tbody tr")
    assert len(rows) == len(ctx.alerts)
    assert all(r["data-opened"] in {d.isoformat() for d in PAGES_DAYS} for r in rows)
    rule_page = BeautifulSoup(pages[rule_page_path("regime-shift")].decode("utf-8"),
                              "html.parser")
    rule_link = rule_page.select_one("li.flood-day a.flood-link")
    assert rule_link is not None
    assert rule_link["href"] == "../index.html#rule=regime-shift&opened=2026-03-05"
    other = BeautifulSoup(pages[rule_page_path("hedge-level")].decode("utf-8"), "html.parser")
    assert other.select("li.flood-day") == []


# --- in the browser -------------------------------------------------------------------

# The chromium fixtures of the browser tests (Debian's /usr/bin/chromium, never a download).
browser = test_pages_browser.browser
tab = test_pages_browser.tab


@pytest.fixture(scope="module")
def flood_site_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    folder = tmp_path_factory.mktemp("flood-site")
    build_site(flood_site(), folder)
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


@pytest.mark.browser
def test_the_busy_day_link_opens_the_index_filtered_to_that_rule_and_day(
    flood_site_url: str, tab: Any
) -> None:
    page = tab.page
    page.goto(flood_site_url + rule_page_path("regime-shift"))
    page.locator("li.flood-day a.flood-link").click()
    page.wait_for_load_state("load")
    page.wait_for_selector("#alert-filter", state="visible")
    assert page.url.endswith("index.html#rule=regime-shift&opened=2026-03-05")
    assert page.input_value("#filter-rule") == "regime-shift"
    assert page.input_value("#filter-opened") == "2026-03-05"
    visible = page.eval_on_selector_all(
        "#alert-table tbody tr", "rows => rows.filter(r => !r.hidden).map(r => r.dataset.alert)")
    assert sorted(int(v) for v in visible) == list(range(5000, 5000 + FLOOD))
    assert page.inner_text("#filter-count") == f"Showing {FLOOD} of {FLOOD + 12} alerts"
    # Clearing the day keeps the rule: the quiet day's alerts of the rule come back.
    page.fill("#filter-opened", "")
    page.dispatch_event("#filter-opened", "change")
    visible = page.eval_on_selector_all(
        "#alert-table tbody tr", "rows => rows.filter(r => !r.hidden).length")
    assert visible == FLOOD + 6
    assert tab.errors == []
