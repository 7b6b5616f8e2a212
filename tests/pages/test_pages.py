"""The alert history site: context -> pages, links, escaping, charts, safe names, rebuilds,
and the read-only server.

Everything here is built from a made-up context of a fictional desk (instruments such as
"KLV" Kelvara Industrial and "DUNQ" Dunquist Freight), including deliberately hostile
symbols and notes, so escaping and file naming are tested on the worst input, not the
usual one.
"""

from __future__ import annotations

import hashlib
import http.client
import json
import math
import os
import re
import threading
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from dataclasses import replace
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from urllib.parse import unquote, urlsplit

import numpy as np
import pytest
from bs4 import BeautifulSoup, Tag
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.bench import pages_speed
from monitor.cautions import cautions
from monitor.errors import ComoveError
from monitor.pages import svg_charts
from monitor.pages.context import (
    AckView,
    AlertSpan,
    AlertSummary,
    DigestLink,
    DriverRow,
    DriversView,
    EventView,
    InstrumentView,
    MeasureHistory,
    PairPage,
    RulePage,
    RunView,
    SiteContext,
    SiteParameters,
    TargetPage,
)
from monitor.pages.paths import pair_page_path, rule_page_path, safe_name, target_page_path
from monitor.pages.render import render_site
from monitor.pages.serve import make_server, server_url
from monitor.pages.write import MANIFEST_NAME, build_site
from monitor.templating import format_corr, format_date

HOSTILE = "<script>alert(1)</script>"
SLASHY = "TEZ/../10"
NON_ASCII = "ÆRØ-Ω"
HOSTILE_RULE = 'spread "<img src=x onerror=alert(2)>"'
HOSTILE_NOTE = "Checked with Orma's desk.\n</td><script>alert(3)</script> & more"

KLV = InstrumentView("KLV", "Kelvara Industrial", "Industrials")
DUNQ = InstrumentView("DUNQ", 'Dunquist Freight & Rail "the line"', "Industrials")
BAD = InstrumentView(HOSTILE, "Name with <b>tags</b> & 'quotes'", "Utilities & Power")
TEZ = InstrumentView(SLASHY, "Tezran 10-year future", "Rates")
AER = InstrumentView(NON_ASCII, "Ærø Kraftværk", "Utilities & Power")

GROUPS = {i.symbol: i.group for i in (KLV, DUNQ, BAD, TEZ, AER)} | {"ORMA": "Utilities & Power"}


def _days(end: date, count: int) -> list[date]:
    days: list[date] = []
    day = end
    while len(days) < count:
        if day.weekday() < 5:
            days.append(day)
        day -= timedelta(days=1)
    return days[::-1]


DAYS = _days(date(2026, 3, 5), 180)


def _history(measure: str, seed: int, gap: slice = slice(0, 20)) -> MeasureHistory:
    rng = np.random.default_rng(seed)
    values = np.clip(0.4 + np.cumsum(rng.normal(0, 0.03, len(DAYS))), -0.95, 0.95)
    values[gap] = np.nan
    return MeasureHistory(measure, DAYS, values, values - 0.2, values + 0.2, levels=(0.6,))


def made_up_context(
    *, drop_pair: str | None = None, generated_at: datetime | None = None
) -> SiteContext:
    """A small desk with every kind of page and hostile text in symbols, names and notes.

    `drop_pair` ("KLV/DUNQ" etc.) leaves that pair's page and its alerts out, as when a pair
    is no longer monitored.
    """
    d = DAYS
    alerts = [
        AlertSummary(101, "open", "critical", "hedge level", "level", "pair", ("KLV", "DUNQ"),
                     opened=d[-10], peak=0.41, measure="rolling:63"),
        AlertSummary(102, "cleared", "warning", "hedge level", "level", "pair", ("KLV", "DUNQ"),
                     opened=d[-60], cleared=d[-40], peak=0.38, acknowledged_by="r.okafor",
                     measure="rolling:63"),
        AlertSummary(103, "retracted", "info", HOSTILE_RULE, "shift", "pair", ("KLV", HOSTILE),
                     opened=d[-30], peak=math.nan, measure="ewma:hl=21"),
        AlertSummary(104, "cleared", "warning", "regime shift", "shift", "pair",
                     (NON_ASCII, SLASHY), opened=d[-90], cleared=d[-70], peak=-0.35,
                     acknowledged_by=HOSTILE, measure="rolling:63"),
        AlertSummary(105, "open", "warning", "group average", "group-average", "group",
                     ("Utilities & Power",), opened=d[-5], peak=0.91),
        AlertSummary(106, "open", "info", "stale closes", "stale", "instrument", (SLASHY,),
                     opened=d[-3]),
        # A pair with no page in the context, written the other way round from usual.
        AlertSummary(107, "cleared", "info", "retired rule", "sign", "pair", ("ORMA", "DUNQ"),
                     opened=d[-120], cleared=d[-110], peak=-0.05),
    ]
    pairs = [
        PairPage(
            KLV, DUNQ,
            measures=[_history("rolling:63", 1), _history("ewma:hl=21", 2, slice(0, 5))],
            spans=[AlertSpan(101, d[-10], None, "hedge level", "critical", "rolling:63"),
                   AlertSpan(102, d[-60], d[-40], "hedge level", "warning", "rolling:63")],
            events=[
                EventView(d[-60], 102, "hedge level", "opened", 0.55, level=0.6,
                          band_low=0.31, band_high=0.72, observations=63),
                EventView(d[-55], 102, "hedge level", "continuing", 0.52, level=0.6,
                          band_low=0.28, band_high=0.70, observations=63),
                EventView(d[-40], 102, "hedge level", "cleared", 0.66, level=0.6,
                          band_low=0.47, band_high=0.79, observations=63),
                EventView(d[-10], 101, "hedge level", "opened", 0.41, level=0.6,
                          band_low=0.18, band_high=0.60, observations=32.33),
            ],
            acknowledgements=[AckView(102, "r.okafor", datetime(2026, 1, 2, 9, 30, tzinfo=UTC),
                                      HOSTILE_NOTE)],
            drivers=[DriversView(101, d[-10], [
                DriverRow(d[-11], -0.041, -0.021, 0.013),
                DriverRow(d[-14], -0.020, 0.008, -0.011),
            ])],
        ),
        PairPage(
            KLV, BAD, measures=[_history("ewma:hl=21", 3)],
            spans=[AlertSpan(103, d[-30], d[-25], HOSTILE_RULE, "info")],
            events=[EventView(d[-30], 103, HOSTILE_RULE, "opened", 0.2, p_value=0.0004,
                              observations=61.2)],
        ),
        PairPage(
            AER, TEZ, measures=[_history("rolling:63", 4)],
            spans=[AlertSpan(104, d[-90], d[-70], "regime shift", "warning")],
            events=[EventView(d[-90], 104, "regime shift", "opened", -0.35, p_value=0.004)],
            acknowledgements=[AckView(104, HOSTILE, datetime(2025, 11, 3, 8, 5, tzinfo=UTC))],
        ),
    ]
    targets = [
        TargetPage("group", "Utilities & Power", "Power & water names",
                   members=["ORMA", HOSTILE, NON_ASCII],
                   measures=[_history("rolling:63", 5)],
                   events=[EventView(d[-5], 105, "group average", "opened", 0.91, level=0.8)]),
    ]
    if drop_pair is not None:
        pairs = [p for p in pairs if p.label != drop_pair]
        alerts = [a for a in alerts if a.target_label != drop_pair]
    return SiteContext(
        desk="Halden Cross-Asset Desk & Co",
        generated_at=generated_at or datetime(2026, 3, 5, 18, 40, tzinfo=UTC),
        data_through=d[-1],
        version="0.1.0-test",
        parameters=SiteParameters(("rolling:63", "ewma:hl=21"), "log", 0.95),
        alerts=alerts,
        pairs=pairs,
        rules=[
            RulePage("hedge level", "level", "critical", "rolling:63",
                     [("level", "0.60"), ("direction", "below"), ("clear_level", "0.65")],
                     "The KLV hedge should stay correlated."),
            RulePage(HOSTILE_RULE, "shift", "info", "ewma:hl=21", [("p_value", "0.01")]),
            RulePage("regime shift", "shift", "warning", "rolling:63"),
            RulePage("group average", "group-average", "warning", "rolling:63"),
            RulePage("stale closes", "stale", "info", "", [("days", "3")]),
        ],
        runs=[
            RunView(1, "backfill", d[-2], "done", datetime(2026, 3, 4, 7, 0, tzinfo=UTC),
                    range_start=d[0], finished=datetime(2026, 3, 4, 7, 3, tzinfo=UTC),
                    duration_seconds=185.0, counts={"days": 178, "alerts opened": 6}),
            RunView(2, "daily", d[-1], "failed", datetime(2026, 3, 5, 18, 30, tzinfo=UTC),
                    duration_seconds=2.5, error="store: " + HOSTILE),
            RunView(3, "daily", d[-1], "running", datetime(2026, 3, 5, 18, 35, tzinfo=UTC)),
        ],
        digests=[
            DigestLink(d[-1], f"digests/{d[-1]}/digest.html", "Halden: 1 new", "sent"),
            DigestLink(d[-2], f"digests/{d[-2]}/digest.html", "Halden: 0 new", "failed"),
        ],
        groups=GROUPS,
        targets=targets,
    )


def _archive_digests(folder: Path, ctx: SiteContext) -> None:
    # The pipeline copies the digest archive; here a stand-in file per link.
    for link in ctx.digests:
        path = folder / link.path
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("<!DOCTYPE html><title>digest</title>", encoding="utf-8")


@pytest.fixture
def site(tmp_path: Path) -> Path:
    folder = tmp_path / "site"
    ctx = made_up_context()
    _archive_digests(folder, ctx)
    build_site(ctx, folder)
    return folder


def _soup(path: Path) -> BeautifulSoup:
    return BeautifulSoup(path.read_text(encoding="utf-8"), "html.parser")


def _html_pages(folder: Path) -> list[Path]:
    return sorted(p for p in folder.rglob("*.html") if "digests" not in p.parts)


def _one(soup: Tag, selector: str) -> Tag:
    found = soup.select_one(selector)
    assert isinstance(found, Tag), f"nothing matches {selector!r}"
    return found


def _attr(element: Tag, name: str) -> str:
    value = element.get(name)
    assert isinstance(value, str), f"{element.name} has no single {name!r}"
    return value


def _cells(row: Tag) -> list[str]:
    return [" ".join(td.get_text(" ", strip=True).split()) for td in row.find_all("td")]


# --- index ---------------------------------------------------------------------------


def test_index_has_one_row_per_alert_with_state_severity_rule_target_dates_peak_and_ack(
    site: Path,
) -> None:
    ctx = made_up_context()
    table = _one(_soup(site / "index.html"), "table#alert-table")
    headers = [th.get_text(strip=True) for th in table.select("thead th")]
    assert headers == ["Alert", "State", "Severity", "Rule", "Watched", "Groups", "Opened",
                       "Cleared", "Peak", "Acknowledged by"]
    rows = table.select("tbody tr")
    assert len(rows) == len(ctx.alerts)
    by_id = {_attr(row, "data-alert"): _cells(row) for row in rows}
    for alert in ctx.alerts:
        cells = by_id[str(alert.id)]
        assert cells[0] == str(alert.id)
        assert cells[1] == alert.state
        assert cells[2] == alert.severity
        assert cells[3] == f"{alert.rule_name} {alert.rule_kind}"
        assert cells[4].startswith(alert.target_label)
        assert cells[6] == format_date(alert.opened)
        if alert.cleared is not None:
            assert cells[7] == format_date(alert.cleared)
        else:
            assert cells[7] in ("not cleared", "n/a")
        assert cells[8] == format_corr(alert.peak)
        assert cells[9] == (alert.acknowledged_by or "not acknowledged")


def test_index_lists_newest_alert_first(site: Path) -> None:
    rows = _soup(site / "index.html").select("#alert-table tbody tr")
    opened = [_cells(row)[6] for row in rows]
    assert opened == sorted(opened, reverse=True)


def test_unknown_peak_prints_as_not_available_never_zero(site: Path) -> None:
    row = _one(_soup(site / "index.html"), 'tr[data-alert="103"]')
    assert _cells(row)[8] == "n/a"


def test_index_rows_carry_the_data_the_filter_reads(site: Path) -> None:
    ctx = made_up_context()
    rows = {_attr(r, "data-alert"): r
            for r in _soup(site / "index.html").select("#alert-table tbody tr")}
    for alert in ctx.alerts:
        row = rows[str(alert.id)]
        assert row["data-state"] == alert.state
        assert row["data-rule"] == alert.rule_name
        groups = json.loads(_attr(row, "data-groups"))
        expected = (set(alert.groups) if alert.groups else
                    {alert.target[0]} if alert.target_kind == "group" else
                    {GROUPS[s] for s in alert.target if s in GROUPS})
        assert set(groups) == expected
        search = _attr(row, "data-search")
        for symbol in alert.target:
            assert symbol.lower() in search
        if alert.target_kind == "pair":
            a, b = alert.target
            assert f"{b}/{a}".lower() in search  # either way round
    assert "kelvara industrial" in _attr(rows["101"], "data-search")


def test_filter_form_is_hidden_until_the_script_runs_and_offers_every_rule_and_group(
    site: Path,
) -> None:
    ctx = made_up_context()
    form = _one(_soup(site / "index.html"), "form#alert-filter")
    assert form.has_attr("hidden")
    rules = [_attr(o, "value") for o in form.select("#filter-rule option")][1:]
    assert rules == sorted({a.rule_name for a in ctx.alerts})
    groups = [_attr(o, "value") for o in form.select("#filter-group option")][1:]
    assert set(groups) == set(GROUPS.values())
    states = {_attr(o, "value"): o.get_text() for o in form.select("#filter-state option")}
    assert states == {"": "any", "open": "open", "cleared": "cleared",
                      "retracted": "retracted (a rerun no longer produces it)"}


def test_instruments_without_a_group_add_no_empty_group_choice() -> None:
    ctx = replace(made_up_context(), groups=GROUPS | {"LONE": ""})
    index = BeautifulSoup(render_site(ctx)["index.html"].decode("utf-8"), "html.parser")
    values = [_attr(o, "value") for o in index.select("#filter-group option")]
    assert values.count("") == 1 and values[0] == ""  # only "any"


# --- links, escaping, cautions -------------------------------------------------------


def _link_targets(page: Path) -> Iterator[tuple[str, str]]:
    soup = _soup(page)
    for tag, attr in (("a", "href"), ("img", "src"), ("link", "href"), ("script", "src")):
        for element in soup.select(f"{tag}[{attr}]"):
            yield tag, _attr(element, attr)


def test_every_link_and_image_in_every_page_resolves_to_a_file_in_the_site(site: Path) -> None:
    pages = _html_pages(site)
    assert len(pages) > 10
    ids_by_page = {p: {_attr(e, "id") for e in _soup(p).select("[id]")} for p in pages}
    checked = 0
    for page in pages:
        for tag, target in _link_targets(page):
            parts = urlsplit(target)
            assert not parts.scheme and not parts.netloc, f"{page}: external {target}"
            assert not target.startswith("/"), f"{page}: absolute {target}"
            if not parts.path:
                assert parts.fragment in ids_by_page[page]
                continue
            file = (page.parent / unquote(parts.path)).resolve()
            assert file.is_file(), f"{page.relative_to(site)}: {tag} -> {target} missing"
            assert site.resolve() in file.parents
            if parts.fragment and file.suffix == ".html":
                assert parts.fragment in ids_by_page[file], f"{target}: no such anchor"
            checked += 1
    assert checked > 100


def test_hostile_text_is_escaped_and_the_only_script_is_site_js(site: Path) -> None:
    for page in _html_pages(site):
        soup = _soup(page)
        scripts = soup.select("script")
        assert len(scripts) == 1, page
        assert _attr(scripts[0], "src").endswith("site.js") and not scripts[0].string
        for element in soup.find_all(True):
            handlers = [a for a in element.attrs if a.lower().startswith("on")]
            assert not handlers, f"{page}: {element.name} has {handlers}"
            assert "style" not in element.attrs, f"{page}: inline style on {element.name}"
        assert soup.select_one('img[src="x"]') is None
    index = _soup(site / "index.html")
    assert HOSTILE in index.get_text()
    assert HOSTILE_RULE in index.get_text()


def test_notes_are_shown_as_written_with_line_breaks_and_markup_as_text(site: Path) -> None:
    page = _soup(site / pair_page_path("KLV", "DUNQ"))
    notes = [td.get_text() for td in page.select("#ack-table td.note")]
    assert notes == [HOSTILE_NOTE]


def test_every_page_has_the_cautions_navigation_data_date_version_and_build_time(
    site: Path,
) -> None:
    ctx = made_up_context()
    expected = cautions(ctx.parameters.confidence_level, where="pages")
    assert len(expected) == 5
    for page in _html_pages(site):
        soup = _soup(page)
        footer = _one(soup, "footer")
        shown = [" ".join(li.get_text().split()) for li in footer.select("ul.cautions li")]
        assert shown == [" ".join(c.split()) for c in expected], page
        assert _one(footer, '[data-field="data-through"]').get_text() == \
            format_date(ctx.data_through)
        built = _one(footer, '[data-field="generated-at"]').get_text()
        assert format_date(ctx.generated_at) in built and ctx.version in built
        nav = [a.get_text() for a in soup.select("header nav a")]
        assert nav == ["Alerts", "Rules", "Runs", "Digests"], page
        assert ctx.desk in _one(soup, "header").get_text()


def test_cautions_say_monitoring_aid_noise_band_no_cause_no_advice_and_firm_decides() -> None:
    level = SiteParameters(("rolling:63",), "log", 0.9).confidence_level
    text = " ".join(cautions(level, where="pages")).lower()
    for words in ("monitoring aid", "noisy", "90 % band", "not say why", "how large",
                  "nothing on these pages is investment advice", "risk policy",
                  "licensed professionals"):
        assert words in text


# --- pair, target, rule, runs and digest pages ---------------------------------------


def test_pair_page_shows_its_alerts_charts_key_numbers_events_acks_and_drivers(
    site: Path,
) -> None:
    ctx = made_up_context()
    pair = ctx.pairs[0]
    soup = _soup(site / pair_page_path("KLV", "DUNQ"))
    assert [_attr(r, "data-alert") for r in soup.select("#target-alerts tbody tr")] == \
        ["101", "102"]
    images = soup.select("section.measure figure img")
    assert len(images) == len(pair.measures)
    for image, history in zip(images, pair.measures, strict=True):
        assert int(_attr(image, "width")) > 0 and int(_attr(image, "height")) > 0
        alt = _attr(image, "alt")
        assert history.measure in alt and "KLV/DUNQ" in alt
    keys = _one(soup, "table#measure-1-keys").get_text(" ", strip=True)
    history = pair.measures[0]
    known = np.isfinite(history.values)
    last = int(np.flatnonzero(known)[-1])
    assert f"{format_corr(history.values[last])} on {format_date(history.dates[last])}" in keys
    assert format_corr(float(np.nanmin(history.values))) in keys
    assert format_corr(float(np.nanmax(history.values))) in keys
    assert f"{int(known.sum())} with a value" in keys
    kinds = [_attr(r, "data-kind") for r in soup.select("#event-table tbody tr")]
    assert kinds == ["opened", "continuing", "cleared", "opened"]
    event_cells = _cells(soup.select("#event-table tbody tr")[3])
    assert event_cells[-1] == "32.3"  # an effective count keeps its decimal
    assert len(soup.select("#ack-table tbody tr")) == 1
    drivers = soup.select("table.drivers tbody tr")
    assert len(drivers) == 2
    assert _cells(drivers[0]) == ["2026-02-19", "\u22120.041", "\u22122.10 %", "1.30 %"]


def test_month_end_table_has_one_row_per_month_with_the_chart_values(site: Path) -> None:
    history = made_up_context().pairs[0].measures[0]
    soup = _soup(site / pair_page_path("KLV", "DUNQ"))
    rows = soup.select("#measure-1 table.month-ends tbody tr")
    months = {(d.year, d.month) for d in history.dates}
    assert len(rows) == len(months)
    index = {d: i for i, d in enumerate(history.dates)}
    for row in rows:
        day_text, value_text, _band = _cells(row)
        day = date.fromisoformat(day_text)
        assert value_text == format_corr(history.values[index[day]])


def test_group_and_instrument_targets_get_their_own_pages(site: Path) -> None:
    group = _soup(site / target_page_path("group", "Utilities & Power"))
    assert _one(group, "h1").get_text() == "Group Utilities & Power"
    assert [_attr(r, "data-alert") for r in group.select("#target-alerts tbody tr")] == ["105"]
    assert len(group.select("section.measure img")) == 1
    stale = _soup(site / target_page_path("instrument", SLASHY))
    assert _one(stale, "h1").get_text() == f"Instrument {SLASHY}"
    assert "No history was supplied" in _one(stale, "p.notice").get_text()


def test_alert_on_a_pair_without_a_page_gets_a_short_page_and_retired_rule_a_page(
    site: Path,
) -> None:
    stub = _soup(site / pair_page_path("DUNQ", "ORMA"))
    assert [_attr(r, "data-alert") for r in stub.select("#target-alerts tbody tr")] == ["107"]
    assert "No history was supplied" in stub.get_text()
    retired = _soup(site / rule_page_path("retired rule"))
    assert "no longer in the configuration" in retired.get_text()
    listing = _soup(site / "rules.html")
    configured = [_cells(r)[-1] for r in listing.select("#rule-table tbody tr")]
    assert configured.count("no longer") == 1


def test_pair_page_is_shared_whichever_order_the_symbols_are_given() -> None:
    assert pair_page_path("KLV", "DUNQ") == pair_page_path("DUNQ", "KLV")
    assert pair_page_path("A/B", "C") != pair_page_path("A", "B/C")
    assert pair_page_path("A", "BC") != pair_page_path("AB", "C")


def test_rule_page_lists_its_settings_and_only_its_alerts(site: Path) -> None:
    soup = _soup(site / rule_page_path("hedge level"))
    settings_rows = [_cells(r) for r in soup.select("#rule-settings tr")]
    assert ["0.60"] in settings_rows and ["below"] in settings_rows
    headers = [th.get_text() for th in soup.select("#rule-settings th")]
    assert headers[-3:] == ["level", "direction", "clear_level"]
    assert [_attr(r, "data-alert") for r in soup.select("#rule-alerts tbody tr")] == \
        ["101", "102"]


def test_runs_page_shows_status_words_durations_counts_and_errors(site: Path) -> None:
    rows = _soup(site / "runs.html").select("#run-table tbody tr")
    cells = {c[0]: c for c in map(_cells, rows)}
    assert [c[0] for c in map(_cells, rows)] == ["3", "2", "1"]  # newest first
    assert cells["1"][3] == "done" and cells["1"][6] == "3 min 05 s"
    assert cells["1"][2] == f"{DAYS[0]} to {DAYS[-2]}"
    assert cells["1"][7] == "days 178; alerts opened 6"
    assert cells["2"][3] == "failed" and cells["2"][8] == "store: " + HOSTILE
    assert cells["3"][3] == "running" and cells["3"][5] == "not recorded"


def test_digest_archive_page_links_each_digest_by_date(site: Path) -> None:
    links = _soup(site / "digests.html").select("#digest-table tbody a")
    assert [a.get_text() for a in links] == [str(DAYS[-1]), str(DAYS[-2])]


def test_a_digest_path_leaving_the_site_is_refused() -> None:
    for path in ("../digest.html", "/etc/digest.html", "a/../../b.html", "C:/x.html", ""):
        with pytest.raises(ComoveError, match="path"):
            DigestLink(DAYS[-1], path)


def test_bad_words_in_the_context_are_refused_naming_the_field() -> None:
    with pytest.raises(ComoveError, match="state: 'closed'"):
        AlertSummary(1, "closed", "info", "r", "level", "pair", ("A", "B"),  # type: ignore[arg-type]
                     opened=DAYS[0])
    with pytest.raises(ComoveError, match="target"):
        AlertSummary(1, "open", "info", "r", "level", "pair", ("A",), opened=DAYS[0])
    with pytest.raises(ComoveError, match="status: 'ok'"):
        RunView(1, "daily", DAYS[0], "ok", datetime(2026, 1, 1, tzinfo=UTC))  # type: ignore[arg-type]
    with pytest.raises(ComoveError, match="rolling:63"):
        MeasureHistory("rolling:63", DAYS[:3], np.array([0.1, 0.2]), np.array([0.0, 0.1]),
                       np.array([0.2, 0.3]))


def test_a_pair_given_twice_is_refused() -> None:
    ctx = made_up_context()
    twice = replace(ctx, pairs=[*ctx.pairs, PairPage(DUNQ, KLV)])
    with pytest.raises(ComoveError, match="appears twice"):
        render_site(twice)


# --- charts --------------------------------------------------------------------------


def test_svg_charts_are_valid_xml_with_a_size_and_no_script(site: Path) -> None:
    charts = sorted(p for p in site.rglob("*.svg") if p.parent != site)
    assert len(charts) == 5
    for chart in charts:
        root = ET.fromstring(chart.read_bytes())
        assert root.tag == "{http://www.w3.org/2000/svg}svg"
        for attribute in ("width", "height"):
            assert float(re.sub("[a-z]+$", "", root.attrib[attribute])) > 0
        assert not [e for e in root.iter() if e.tag.endswith("script")]
        assert not [e for e in root.iter() for a in e.attrib if a.lower().startswith("on")]


def test_chart_title_with_markup_is_text_inside_the_svg(site: Path) -> None:
    chart = next((site / "pairs").glob(Path(pair_page_path("KLV", HOSTILE)).stem + "-1.svg"))
    texts = [e.text or "" for e in ET.fromstring(chart.read_bytes()).iter()
             if e.tag.endswith("text")]
    assert any(HOSTILE in t for t in texts)


def test_chart_with_dollar_signs_is_drawn_literally_not_as_mathtext() -> None:
    chart = svg_charts.history_chart(DAYS[:5], [0.1] * 5, [0.0] * 5, [0.2] * 5,
                                       title="$KLV$ vs $DUNQ")
    texts = [e.text for e in ET.fromstring(chart.svg).iter() if e.tag.endswith("text")]
    assert "$KLV$ vs $DUNQ" in texts


def test_same_chart_gives_the_same_bytes_whatever_was_drawn_before() -> None:
    history = _history("rolling:63", 9)
    spans = [svg_charts.ChartSpan(DAYS[40], DAYS[50]), svg_charts.ChartSpan(DAYS[-3], None)]

    def draw() -> bytes:
        return svg_charts.history_chart(history.dates, history.values, history.band_low,
                                          history.band_high, spans=spans, levels=[0.6],
                                          title="KLV/DUNQ").svg

    first = draw()
    svg_charts.history_chart(DAYS[:30], np.linspace(-1, 1, 30), np.full(30, np.nan),
                               np.full(30, np.nan), levels=[-0.2, 0.9], title="other")
    assert draw() == first
    assert b"<dc:date>" not in first  # no timestamp in the metadata


def test_empty_single_day_and_all_missing_histories_still_draw() -> None:
    for dates, values in (([], []), (DAYS[:1], [0.3]), (DAYS[:10], [math.nan] * 10)):
        chart = svg_charts.history_chart(dates, values, values, values)
        assert ET.fromstring(chart.svg).tag.endswith("svg")


def test_chart_arrays_of_different_lengths_are_refused() -> None:
    with pytest.raises(ValueError, match="differ in length"):
        svg_charts.history_chart(DAYS[:3], [0.1, 0.2], [0.1, 0.2], [0.1, 0.2])


@given(st.lists(st.dates(), max_size=30))
@settings(max_examples=100, deadline=None)
def test_fast_date_conversion_agrees_with_numpy(days: list[date]) -> None:
    fast = svg_charts._as_days(days)
    assert fast.dtype == np.dtype("datetime64[D]")
    assert fast.tolist() == np.asarray(days, dtype="datetime64[D]").tolist()


def test_cache_key_changes_with_any_input_and_not_otherwise() -> None:
    history = _history("rolling:63", 3)
    base = svg_charts.HistoryChartRequest.build(
        history.dates, history.values, history.band_low, history.band_high, levels=(0.6,),
        title="t")
    same = svg_charts.HistoryChartRequest.build(
        list(history.dates), history.values.copy(), history.band_low, history.band_high,
        levels=[0.6], title="t")
    assert base.cache_key() == same.cache_key()
    values = history.values.copy()
    values[-1] += 1e-9
    changed = [
        replace(base, values=values),
        replace(base, levels=(0.61,)),
        replace(base, title="u"),
        replace(base, spans=(svg_charts.ChartSpan(DAYS[3], None),)),
    ]
    assert len({c.cache_key() for c in changed} | {base.cache_key()}) == 5


@pytest.mark.slow
def test_charts_drawn_in_worker_processes_are_identical_to_charts_drawn_here() -> None:
    requests = [
        svg_charts.HistoryChartRequest.build(
            DAYS[:60], np.linspace(-0.5, 0.5, 60) + k / 100, np.full(60, -0.6),
            np.full(60, 0.6), spans=[svg_charts.ChartSpan(DAYS[k % 50], None)],
            title=f"KLV{k:02d}/DUNQ")
        for k in range(svg_charts.PARALLEL_MINIMUM)
    ]
    here = svg_charts.render_history_charts(requests, workers=1)
    pooled = svg_charts.render_history_charts(requests, workers=2)
    assert [c.svg for c in pooled] == [c.svg for c in here]


# --- safe names ----------------------------------------------------------------------

SAFE = re.compile(r"^[a-z0-9][a-z0-9-]*-[0-9a-f]{12}$")


@given(st.text())
@settings(max_examples=300, deadline=None)
def test_safe_name_is_short_lowercase_ascii_and_stable(text: str) -> None:
    name = safe_name(text)
    assert SAFE.match(name), name
    assert len(name) <= 40 + 1 + 12
    assert name == safe_name(text)
    assert name.endswith(hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:12])


@given(st.text(), st.text())
@settings(max_examples=300, deadline=None)
def test_different_texts_never_share_a_safe_name_even_ignoring_case(a: str, b: str) -> None:
    if a != b:
        assert safe_name(a).lower() != safe_name(b).lower()


@pytest.mark.parametrize("text", [
    "/", "..", ".", "../..", "a b", "a\\b", "\x00", "x" * 5000, NON_ASCII, HOSTILE,
    "CON", "nul", "-rf", ".hidden", "KLV", "klv", "", " ", "\u202e", "😀",
])
def test_awkward_symbols_map_to_plain_file_names(text: str) -> None:
    name = safe_name(text)
    assert SAFE.match(name), name
    assert name not in (".", "..") and "/" not in name and "\\" not in name


def test_safe_names_keep_a_readable_part() -> None:
    assert safe_name("KLV").startswith("klv-")
    assert safe_name("Ærø Kraft").startswith("aero-kraft-")
    assert safe_name("KLV") != safe_name("klv")


# --- rebuilding ----------------------------------------------------------------------


def test_rebuild_with_the_same_context_writes_nothing_and_draws_no_chart(tmp_path: Path) -> None:
    ctx = made_up_context()
    first = build_site(ctx, tmp_path)
    assert first.written == len(first.files) and first.unchanged == 0
    stamps = {f: (tmp_path / f).stat().st_mtime_ns for f in first.files}
    second = build_site(ctx, tmp_path)
    assert (second.written, second.removed, second.charts_drawn) == (0, 0, 0)
    assert second.unchanged == len(first.files)
    assert {f: (tmp_path / f).stat().st_mtime_ns for f in first.files} == stamps


def test_rebuild_removes_pages_of_a_pair_no_longer_present_and_nothing_else(
    tmp_path: Path,
) -> None:
    ctx = made_up_context()
    _archive_digests(tmp_path, ctx)
    (tmp_path / "notes.txt").write_text("kept", encoding="utf-8")
    first = build_site(ctx, tmp_path)
    stem = Path(pair_page_path("KLV", HOSTILE)).stem
    gone = {f for f in first.files if Path(f).name.startswith(stem)}
    assert len(gone) == 2  # the page and its chart
    second = build_site(made_up_context(drop_pair=f"KLV/{HOSTILE}"), tmp_path)
    assert second.removed == len(gone)
    for relative in gone:
        assert not (tmp_path / relative).exists()
    assert (tmp_path / "notes.txt").read_text(encoding="utf-8") == "kept"
    assert all((tmp_path / d.path).is_file() for d in ctx.digests)
    index = _soup(tmp_path / "index.html")
    assert index.select_one('tr[data-alert="103"]') is None


def test_changed_build_time_rewrites_pages_but_draws_no_chart(tmp_path: Path) -> None:
    build_site(made_up_context(), tmp_path)
    later = build_site(made_up_context(generated_at=datetime(2026, 3, 6, 18, 40, tzinfo=UTC)),
                       tmp_path)
    assert later.charts_drawn == 0
    assert later.written == sum(1 for f in later.files if f.endswith(".html"))


def test_chart_file_altered_on_disk_is_drawn_again(tmp_path: Path) -> None:
    report = build_site(made_up_context(), tmp_path)
    chart = tmp_path / next(f for f in report.files if f.endswith("-1.svg"))
    original = chart.read_bytes()
    chart.write_bytes(b"<svg/>")
    again = build_site(made_up_context(), tmp_path)
    assert again.charts_drawn == 1 and again.written == 1
    assert chart.read_bytes() == original


def test_a_failed_write_leaves_the_old_page_whole_and_no_temporary_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    build_site(made_up_context(), tmp_path)
    before = (tmp_path / "index.html").read_bytes()

    def refuse(source: str, target: str) -> None:
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", refuse)
    with pytest.raises(OSError, match="disk full"):
        build_site(made_up_context(generated_at=datetime(2026, 3, 9, tzinfo=UTC)), tmp_path)
    assert (tmp_path / "index.html").read_bytes() == before
    assert not [p for p in tmp_path.rglob("*.tmp")]


def test_a_manifest_pointing_outside_the_site_removes_nothing_outside(tmp_path: Path) -> None:
    outside = tmp_path / "precious.txt"
    outside.write_text("keep me", encoding="utf-8")
    folder = tmp_path / "site"
    folder.mkdir()
    (folder / MANIFEST_NAME).write_text(
        json.dumps({"format": 1, "files": ["../precious.txt", str(outside)]}), encoding="utf-8")
    report = build_site(made_up_context(), folder)
    assert report.removed == 0 and outside.read_text(encoding="utf-8") == "keep me"


def test_an_output_path_that_is_a_file_is_refused(tmp_path: Path) -> None:
    file = tmp_path / "site"
    file.write_text("", encoding="utf-8")
    with pytest.raises(ComoveError, match="out: .* is not a folder"):
        build_site(made_up_context(), file)


def test_missing_digest_files_are_reported(tmp_path: Path) -> None:
    report = build_site(made_up_context(), tmp_path)
    assert report.missing_digests == tuple(d.path for d in made_up_context().digests)


# --- serving -------------------------------------------------------------------------

SECRET = "do-not-serve-4f1c"


@pytest.fixture
def served(site: Path) -> Iterator[tuple[str, int, Path]]:
    (site.parent / "secret.txt").write_text(SECRET, encoding="utf-8")
    (site / "pairs" / "link-out.txt").symlink_to(site.parent / "secret.txt")
    (site / "dir-out").symlink_to(site.parent)
    server = make_server(site)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05},
                              daemon=True)
    thread.start()
    host, port = server.server_address[:2]
    try:
        yield str(host), int(port), site
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)


def _request(host: str, port: int, method: str, target: str) -> tuple[int, dict[str, str], bytes]:
    connection = http.client.HTTPConnection(host, port, timeout=10)
    try:
        # skip_host etc. are not needed; putrequest sends the target byte for byte.
        connection.putrequest(method, target, skip_accept_encoding=True)
        connection.endheaders()
        response = connection.getresponse()
        body = response.read()
        return response.status, {k.lower(): v for k, v in response.getheaders()}, body
    finally:
        connection.close()


def test_server_answers_pages_charts_script_and_style_with_their_types_and_headers(
    served: tuple[str, int, Path],
) -> None:
    host, port, site = served
    chart = next(p for p in (site / "pairs").glob("*.svg")).relative_to(site).as_posix()
    expected = {
        "/": "text/html; charset=utf-8",
        "/index.html": "text/html; charset=utf-8",
        f"/{chart}": "image/svg+xml",
        "/site.js": "text/javascript; charset=utf-8",
        "/site.css": "text/css; charset=utf-8",
    }
    for target, content_type in expected.items():
        status, headers, body = _request(host, port, "GET", target)
        assert status == 200, target
        assert headers["content-type"] == content_type
        assert headers["x-content-type-options"] == "nosniff"
        assert int(headers["content-length"]) == len(body)
        path = site / ("index.html" if target == "/" else target.lstrip("/"))
        assert body == path.read_bytes()
    policy = _request(host, port, "GET", "/index.html")[1]["content-security-policy"]
    assert "script-src 'self'" in policy and "style-src 'self'" in policy
    assert "img-src 'self'" in policy and "unsafe" not in policy


def test_head_sends_the_headers_without_the_body(served: tuple[str, int, Path]) -> None:
    host, port, site = served
    status, headers, body = _request(host, port, "HEAD", "/index.html")
    assert status == 200 and body == b""
    assert int(headers["content-length"]) == (site / "index.html").stat().st_size


@pytest.mark.parametrize("target", [
    "/../secret.txt",
    "/%2e%2e/secret.txt",
    "/%2E%2E/secret.txt",
    "/..%2fsecret.txt",
    "/%2e%2e%2fsecret.txt",
    "/pairs/../../secret.txt",
    "/pairs/%2e%2e/%2e%2e/secret.txt",
    "/./../secret.txt",
    "/..\\secret.txt",
    "/%5c..%5csecret.txt",
    "/%252e%252e/secret.txt",
    "/pairs/link-out.txt",
    "/dir-out/secret.txt",
    "/secret.txt%00.html",
    "/%ff%fe",
    "../secret.txt",
    "http://127.0.0.1/../secret.txt",
    "/C:/secret.txt",
    f"/{MANIFEST_NAME}",
    "/pairs/",
])
def test_requests_outside_the_folder_or_hidden_are_refused_without_content(
    served: tuple[str, int, Path], target: str
) -> None:
    host, port, site = served
    status, _headers, body = _request(host, port, "GET", target)
    assert status in (400, 403, 404), target
    assert SECRET.encode() not in body
    assert b"files" not in body


def test_absolute_file_system_paths_are_not_served(served: tuple[str, int, Path]) -> None:
    host, port, site = served
    secret = (site.parent / "secret.txt").resolve()
    for target in (str(secret), "/" + str(secret), "//" + str(secret).lstrip("/")):
        status, _headers, body = _request(host, port, "GET", target)
        assert status in (400, 403, 404) and SECRET.encode() not in body


@pytest.mark.parametrize("method", ["POST", "PUT", "DELETE", "PATCH", "OPTIONS", "BREW"])
def test_methods_other_than_get_and_head_get_405(
    served: tuple[str, int, Path], method: str
) -> None:
    host, port, site = served
    before = (site / "index.html").read_bytes()
    status, headers, _body = _request(host, port, method, "/index.html")
    assert status == 405 and headers["allow"] == "GET, HEAD"
    assert (site / "index.html").read_bytes() == before


def test_quiet_server_logs_refusals_to_stderr_and_not_successes(
    served: tuple[str, int, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    host, port, _site = served
    capsys.readouterr()
    assert _request(host, port, "GET", "/index.html")[0] == 200
    assert capsys.readouterr().err == ""
    assert _request(host, port, "GET", "/../secret.txt")[0] == 403
    logged = capsys.readouterr().err.splitlines()
    assert len(logged) == 1 and "403" in logged[0] and SECRET not in logged[0]


def test_server_refuses_a_non_loopback_address_and_accepts_localhost(tmp_path: Path) -> None:
    with pytest.raises(ComoveError, match="host: '0.0.0.0' is not a loopback"):
        make_server(tmp_path, host="0.0.0.0")
    server = make_server(tmp_path, host="localhost")
    try:
        assert server_url(server).startswith("http://127.0.0.1:") or "::1" in server_url(server)
    finally:
        server.server_close()


def test_server_refuses_a_folder_that_does_not_exist(tmp_path: Path) -> None:
    with pytest.raises(ComoveError, match="folder: .* is not a folder"):
        make_server(tmp_path / "nowhere")


# --- benchmark -----------------------------------------------------------------------


def test_benchmark_quick_json_reports_its_figures(capsys: pytest.CaptureFixture[str]) -> None:
    assert pages_speed.main(["--quick", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["pairs"] == 8 and figures["alerts"] == 40
    assert figures["charts"] == 2 * figures["pairs"] == figures["charts_drawn"]
    assert figures["rebuild_written"] == 0 and figures["rebuild_charts_drawn"] == 0
    assert figures["rebuild_unchanged"] == figures["files"]
    assert figures["build_seconds"] > 0 and figures["target_seconds"] == 60.0
    assert figures["within_target"] == (figures["build_seconds"] < 60.0)


def test_benchmark_json_from_the_command_line_is_json_alone(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`comove bench pages --quick --json`: the build's progress lines go to stderr, so
    stdout is the JSON a program reads, nothing else."""
    from monitor.cli import main

    assert main(["bench", "pages", "--quick", "--json"]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out)["pairs"] == 8
    assert "charts drawn" in captured.err
