"""The evening digest: context -> HTML, text, PNG charts, email structure, benchmark."""

from __future__ import annotations

import csv
import email
import io
import json
import math
import re
from datetime import UTC, date, datetime, timedelta, timezone
from email.message import EmailMessage
from email.policy import default as default_policy
from pathlib import Path

import jinja2
import numpy as np
import pytest
from bs4 import BeautifulSoup, Tag

from monitor.bench import digest_speed
from monitor.digest import png_charts
from monitor.digest.context import (
    AlertHistory,
    AlertView,
    DataIssueView,
    DigestContext,
    DigestParameters,
    DriverView,
    GroupAverageView,
    HeatmapView,
    Instrument,
    MoverView,
)
from monitor.digest.figures import MATRIX_TABLE_MAX
from monitor.digest.files import write_digest
from monitor.digest.footer import cautions, noise_band
from monitor.digest.message import build_message
from monitor.digest.render import digest_subject, render_digest
from monitor.digest.rendered import RenderedDigest
from monitor.errors import ConfigError
from monitor.templating import (
    format_corr,
    format_date,
    format_percent,
    format_pvalue,
    format_signed,
    make_environment,
    templates_dir,
)

AS_OF = date(2026, 3, 5)
HOSTILE = "<script>alert(1)</script>"
AMPERSAND = "Tarn & Sons \"Holdings\" 'B'"
NON_ASCII = "Zürlen Kraftwerk Σ"

KLV = Instrument("KLV", "Kelvara Industrial")
ORMA = Instrument("ORMA", "Orma Utilities")
TEZ10 = Instrument("TEZ10", "Tezzin 10y future")
XSS = Instrument("VRX", HOSTILE)
TARN = Instrument("TARN", AMPERSAND)
ZRL = Instrument("ZRL", NON_ASCII)


def _days(count: int) -> list[date]:
    return [AS_OF - timedelta(days=count - 1 - i) for i in range(count)]


def _history(count: int = 260, gap: slice = slice(40, 55)) -> AlertHistory:
    rng = np.random.default_rng(11)
    values = np.clip(0.5 + np.cumsum(rng.normal(0, 0.02, count)), -0.95, 0.95)
    values[gap] = np.nan
    return AlertHistory(_days(count), values, values - 0.12, values + 0.12)


def _drivers() -> list[DriverView]:
    # Seven days, so the digest must pick the five largest |contribution|.
    contributions = [0.01, -0.09, 0.05, 0.002, -0.07, 0.03, 0.11]
    return [
        DriverView(AS_OF - timedelta(days=i), c, 0.001 * (i + 1), -0.002 * (i + 1))
        for i, c in enumerate(contributions)
    ]


def _alert(
    alert_id: int,
    severity: str,
    a: Instrument,
    b: Instrument,
    *,
    value: float,
    level: float | None = 0.8,
    p_value: float | None = None,
    state: str = "new",
    **extra: object,
) -> AlertView:
    return AlertView(
        id=alert_id,
        severity=severity,  # type: ignore[arg-type]
        rule_name="hedge level" if p_value is None else "regime shift",
        rule_kind="level" if p_value is None else "shift",
        a=a,
        b=b,
        measure="rolling:63",
        value=value,
        band_low=value - 0.1,
        band_high=value + 0.07,
        level=level,
        clear_level=None if level is None else level - 0.1,
        direction="above" if level is not None else "",
        strength="strong",
        p_value=p_value,
        z=None if p_value is None else 3.1,
        baseline=None if p_value is None else 0.21,
        days_held=3,
        opened=AS_OF - timedelta(days=2),
        state=state,
        drivers=_drivers() if state == "new" else (),
        history=_history() if state == "new" else None,
        observations=63.0,
        **extra,  # type: ignore[arg-type]
    )


def _context(**overrides: object) -> DigestContext:
    new_alerts = [
        _alert(11, "info", KLV, ORMA, value=0.84),
        _alert(12, "warning", KLV, TEZ10, value=0.83),  # 0.03 past its level
        _alert(13, "critical", XSS, TARN, value=0.86),
        _alert(14, "warning", ZRL, ORMA, value=0.93),  # 0.13 past: before alert 12
        _alert(15, "warning", ORMA, TEZ10, value=0.55, level=None, p_value=0.004),
    ]
    fields: dict[str, object] = {
        "desk": "Kelvara Rates & Hedges",
        "as_of": AS_OF,
        "data_through": AS_OF,
        "generated_at": datetime(2026, 3, 5, 18, 30, tzinfo=timezone(timedelta(hours=1))),
        "parameters": DigestParameters(("rolling:63", "ewma:hl=21"), (63.0, 41.0), "log"),
        "version": "0.1.0",
        "new_alerts": new_alerts,
        "continuing": [_alert(21, "warning", TEZ10, ZRL, value=0.81, state="continuing")],
        "acknowledged": [
            _alert(
                31, "critical", KLV, ZRL, value=0.9, state="acknowledged",
                acknowledged_by="m.ferrante",
                acknowledged_at=datetime(2026, 3, 4, 9, 5, tzinfo=UTC),
                acknowledgement_note="hedge ratio under review",
            )
        ],
        "cleared": [_alert(41, "info", ORMA, ZRL, value=0.62, state="cleared")],
        "movers": [
            MoverView(KLV, ZRL, "ewma:hl=21", 0.12, 0.48),
            MoverView(ORMA, TEZ10, "ewma:hl=21", 0.71, 0.52),
            MoverView(XSS, KLV, "ewma:hl=21", 0.3, math.nan),
        ],
        "group_averages": [
            GroupAverageView("Kelvara core", 0.44, 0.31, 3, 3, _days(63),
                             np.linspace(0.31, 0.44, 63)),
            GroupAverageView("Orma single", math.nan, math.nan, 0, 1),
        ],
        "data_quality": [
            DataIssueView(
                "restated", "TARN", AS_OF - timedelta(days=1), "close 41.20 restated to 14.20"
            ),
            DataIssueView("stale", "ZRL", AS_OF - timedelta(days=2), "no close for 2 days"),
        ],
        "heatmaps": [
            HeatmapView(
                "Kelvara core", ("KLV", "ORMA", "TEZ10"),
                np.array([[1.0, 0.4, 0.2], [0.4, 1.0, np.nan], [0.2, np.nan, 1.0]]),
            ),
            HeatmapView("Orma single", ("ORMA",), np.ones((1, 1))),
        ],
    }
    fields.update(overrides)
    return DigestContext(**fields)  # type: ignore[arg-type]


@pytest.fixture(scope="module")
def rendered() -> RenderedDigest:
    return render_digest(_context())


@pytest.fixture(scope="module")
def soup(rendered: RenderedDigest) -> BeautifulSoup:
    return BeautifulSoup(rendered.html_for_email, "html.parser")


def _squash(text: str) -> str:
    return " ".join(text.split())


# --- filters and environment -------------------------------------------------------


def test_filters_print_signs_decimals_and_gaps() -> None:
    assert format_corr(0.8349) == "0.83"
    assert format_corr(-0.05) == "\u22120.05"
    assert format_corr(-0.001) == "0.00"  # no "-0.00"
    assert format_corr(math.nan) == "n/a"
    assert format_signed(0.12) == "+0.12"
    assert format_signed(-0.05) == "\u22120.05"
    assert format_signed(0.0001) == "0.00"
    assert format_signed(None) == "n/a"
    assert format_percent(0.0123) == "1.2 %"
    assert format_percent(-0.00456, 2) == "\u22120.46 %"
    assert format_pvalue(0.0004) == "< 0.001"
    assert format_pvalue(0.0123) == "0.012"
    assert format_pvalue(math.nan) == "n/a"
    assert format_date(date(2026, 3, 5)) == "2026-03-05"
    assert format_date(datetime(2026, 3, 5, 18, 30, tzinfo=timezone(timedelta(hours=1)))) == (
        "2026-03-05 18:30 +01:00"
    )


def test_environment_escapes_html_not_text_and_rejects_unknown_names() -> None:
    environment = make_environment(
        [jinja2.DictLoader(
            {"probe.html": "{{ x }}", "probe.txt": "{{ x }}", "bad.html": "{{ y }}"}
        )]
    )
    assert environment.get_template("probe.html").render(x="<b>&") == "&lt;b&gt;&amp;"
    assert environment.get_template("probe.txt").render(x="<b>&") == "<b>&"
    with pytest.raises(jinja2.UndefinedError):
        environment.get_template("bad.html").render()


def test_templates_dir_finds_the_shipped_digest_templates() -> None:
    folder = templates_dir()
    assert (folder / "base.html").is_file()
    assert (folder / "digest.html").is_file()
    assert (folder / "digest.txt").is_file()


# --- HTML structure ----------------------------------------------------------------


def test_html_has_every_section_with_its_title(soup: BeautifulSoup) -> None:
    titles = {
        "new-alerts": "New alerts",
        "still-open": "Still open",
        "acknowledged": "Acknowledged",
        "cleared-today": "Cleared today",
        "movers": "Largest changes over 5 days",
        "group-averages": "Group averages",
        "group-matrices": "Correlation within groups",
        "data-quality": "Data quality",
        "about": "About these numbers",
    }
    for section_id, title in titles.items():
        section = soup.find(id=section_id)
        assert isinstance(section, Tag), section_id
        heading = section.find("h2")
        assert heading is not None and heading.get_text(strip=True) == title


def test_headline_states_data_date_counts_and_attention() -> None:
    ctx = _context(
        data_through=AS_OF - timedelta(days=2),
        data_attention=True,
        attention_message="no new closes since 2026-03-03",
    )
    page = BeautifulSoup(render_digest(ctx).html_for_email, "html.parser")
    headline = page.find(id="headline")
    assert isinstance(headline, Tag)
    assert headline.select_one(".data-through").get_text() == "2026-03-03"  # type: ignore[union-attr]
    assert headline.select_one(".count-new").get_text() == "5"  # type: ignore[union-attr]
    assert headline.select_one(".count-open").get_text() == "2"  # type: ignore[union-attr]
    assert headline.select_one(".count-cleared").get_text() == "1"  # type: ignore[union-attr]
    attention = headline.select_one(".attention")
    assert attention is not None
    assert "no new closes since 2026-03-03" in attention.get_text()


def test_headline_has_no_attention_box_when_data_is_fine(soup: BeautifulSoup) -> None:
    assert soup.select_one("#headline .attention") is None


def test_new_alerts_are_ordered_most_severe_first(soup: BeautifulSoup) -> None:
    blocks = soup.select("#new-alerts table.alert")
    ids = [block["data-alert-id"] for block in blocks]
    severities = [block["data-severity"] for block in blocks]
    # critical, then warnings (shift by p-value first, then by distance past the level:
    # 14 is 0.13 past 0.80, 12 is 0.03 past), then info.
    assert ids == ["13", "15", "14", "12", "11"]
    assert severities == ["critical", "warning", "warning", "warning", "info"]


def test_severity_is_written_as_a_word_not_only_a_colour(soup: BeautifulSoup) -> None:
    for label in soup.select(".severity"):
        assert label.get_text(strip=True) == str(label["data-severity"]).upper()


def test_each_new_alert_shows_value_band_and_level(soup: BeautifulSoup) -> None:
    block = soup.select_one('#new-alerts table.alert[data-alert-id="12"]')
    assert block is not None
    assert block.select_one(".value").get_text(strip=True) == "0.83"  # type: ignore[union-attr]
    assert block.select_one(".band").get_text(strip=True) == "0.73 to 0.90"  # type: ignore[union-attr]
    assert block.select_one(".level").get_text(strip=True) == "above 0.80"  # type: ignore[union-attr]
    assert block.select_one(".clear-level").get_text(strip=True) == "0.70"  # type: ignore[union-attr]
    for other in soup.select("#new-alerts table.alert"):
        for cls in ("value", "band", "level", "days-held", "opened"):
            assert other.select_one(f".{cls}") is not None, (other["data-alert-id"], cls)


def test_shift_alert_shows_p_value_and_baseline(soup: BeautifulSoup) -> None:
    block = soup.select_one('#new-alerts table.alert[data-alert-id="15"]')
    assert block is not None
    assert block.select_one(".p-value").get_text(strip=True) == "0.004"  # type: ignore[union-attr]
    assert block.select_one(".baseline").get_text(strip=True) == "0.21"  # type: ignore[union-attr]
    assert block.select_one(".level").get_text(strip=True) == "n/a"  # type: ignore[union-attr]


def test_drivers_table_lists_five_largest_days_with_both_returns(soup: BeautifulSoup) -> None:
    block = soup.select_one('#new-alerts table.alert[data-alert-id="11"]')
    assert block is not None
    rows = block.select("table.drivers tbody tr:not(.other-days)")
    assert len(rows) == 5
    contributions = [row.select_one(".contribution").get_text() for row in rows]  # type: ignore[union-attr]
    # Of 0.01, -0.09, 0.05, 0.002, -0.07, 0.03, 0.11 the five largest in size:
    assert contributions == ["+0.110", "\u22120.090", "\u22120.070", "+0.050", "+0.030"]
    # the remainder, so that the table adds up to the value the drivers explain
    other = block.select_one("table.drivers tr.other-days")
    assert other is not None
    assert _squash(other.get_text(" ")) == "the other 2 days +0.012"
    note = _squash(block.select_one("table.drivers").find_previous("div").get_text())  # type: ignore[union-attr]
    assert note == "Days that moved the value most: each date's share of rolling:63 = +0.042"
    first = rows[0]
    # Day index 6 of _drivers(): returns 0.7 % and -1.4 %.
    assert first.select_one(".return-a").get_text() == "0.70 %"  # type: ignore[union-attr]
    assert first.select_one(".return-b").get_text() == "\u22121.40 %"  # type: ignore[union-attr]
    headers = [th.get_text() for th in block.select("table.drivers thead th")]
    assert headers == ["Day", "Return KLV", "Return ORMA", "Contribution"]


def test_still_open_alerts_are_flagged_as_reminders(soup: BeautifulSoup) -> None:
    rows = soup.select("#still-open tr.alert-row")
    assert [row["data-alert-id"] for row in rows] == ["21"]
    assert rows[0].select_one(".reminder") is not None


def test_acknowledged_list_shows_who_when_and_note(soup: BeautifulSoup) -> None:
    row = soup.select_one("#acknowledged tr.alert-row")
    assert row is not None
    text = _squash(row.get_text(" "))
    assert "m.ferrante" in text
    assert "2026-03-04 09:05 +00:00" in text
    assert "hedge ratio under review" in text


def test_movers_are_ordered_by_size_of_change_with_unknown_last(soup: BeautifulSoup) -> None:
    changes = [cell.get_text() for cell in soup.select("#movers tr.mover .change")]
    assert changes == ["\u22120.36", "+0.19", "n/a"]


def test_group_averages_show_now_before_change_and_pairs(soup: BeautifulSoup) -> None:
    rows = soup.select("#group-averages tr.group-average")
    cells = [td.get_text(strip=True) for td in rows[0].find_all("td")[:5]]
    assert cells == ["Kelvara core", "0.44", "0.31", "+0.13", "3 of 3"]
    single = [td.get_text(strip=True) for td in rows[1].find_all("td")]
    assert single[1] == "n/a" and single[-1] == "n/a"  # no history: no chart


def test_one_instrument_group_gets_a_note_and_no_heatmap(soup: BeautifulSoup) -> None:
    groups = soup.select("#group-matrices .group-matrix")
    assert len(groups) == 2
    assert groups[0].find("img") is not None
    assert groups[0].select_one("table.matrix") is not None
    assert groups[1].find("img") is None
    assert "One instrument only" in groups[1].get_text()


def test_matrix_table_follows_the_drawn_order_and_shows_gaps(soup: BeautifulSoup) -> None:
    table = soup.select_one("#group-matrices table.matrix")
    assert table is not None
    header = [th.get_text() for th in table.select("thead th")][1:]
    assert sorted(header) == ["KLV", "ORMA", "TEZ10"]
    rows = {tr.th.get_text(): [td.get_text() for td in tr.find_all("td")]  # type: ignore[union-attr]
            for tr in table.select("tbody tr")}
    orma = dict(zip(header, rows["ORMA"], strict=True))
    assert orma == {"KLV": "0.40", "ORMA": "1.00", "TEZ10": "n/a"}


def test_data_quality_lists_every_issue(soup: BeautifulSoup) -> None:
    rows = [_squash(tr.get_text(" ")) for tr in soup.select("#data-quality tr.data-issue")]
    assert rows == [
        "stale ZRL 2026-03-03 no close for 2 days",
        "restated TARN 2026-03-04 close 41.20 restated to 14.20",
    ]


def test_footer_shows_parameters_version_and_cautions(
    rendered: RenderedDigest, soup: BeautifulSoup
) -> None:
    about = soup.find(id="about")
    assert isinstance(about, Tag)
    text = _squash(about.get_text(" "))
    assert "rolling:63, ewma:hl=21" in text
    assert "log, over 1 business day" in text
    assert "comove 0.1.0" in text
    items = [_squash(li.get_text()) for li in about.select("ul.cautions li")]
    expected = [_squash(c) for c in cautions(_context().parameters)]
    assert items == expected
    plain = _squash(rendered.text)
    for caution in expected:
        assert caution in plain


def test_caution_states_band_width_from_the_fisher_formula() -> None:
    # Fisher z (REFERENCES.md): half-width at r = 0 is tanh(1.959964 / sqrt(n - 3));
    # n = 63 -> tanh(0.25303) = 0.2478, n = 41 -> tanh(0.31795) = 0.3077.
    text = cautions(DigestParameters(("rolling:63", "ewma:hl=21"), (63.0, 41.0), "log"))[1]
    assert "rolling:63 (about 63 observations): \u00b10.25" in text
    assert "ewma:hl=21 (about 41 observations): \u00b10.31" in text


def test_noise_band_matches_the_fisher_worked_value() -> None:
    # REFERENCES.md, Fisher (1915, 1921): r = 0.5, n = 50, 95 % -> (0.2574879, 0.6832563).
    low, high = noise_band(0.5, 50, 0.95)
    assert low == pytest.approx(0.2574879, abs=1e-7)
    assert high == pytest.approx(0.6832563, abs=1e-7)
    assert all(math.isnan(v) for v in noise_band(0.5, 3, 0.95))


# --- email safety --------------------------------------------------------------------


def test_html_has_no_script_and_no_external_resources(rendered: RenderedDigest) -> None:
    for html in (rendered.html_for_email, rendered.html_for_files):
        page = BeautifulSoup(html, "html.parser")
        assert page.find("script") is None
        assert page.find("link") is None
        assert not re.search(r"https?://", html)
        for tag in page.find_all(True):
            for attribute in ("src", "href", "background"):
                value = tag.get(attribute)
                assert value is None or not str(value).startswith(("http:", "https:", "//"))


def test_hostile_and_non_ascii_names_are_escaped_in_html_and_intact_in_text(
    rendered: RenderedDigest, soup: BeautifulSoup
) -> None:
    assert HOSTILE not in rendered.html_for_email
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in rendered.html_for_email
    assert soup.find("script") is None
    visible = soup.get_text()
    assert HOSTILE in visible  # the parser decodes the escaped name back to its text
    assert AMPERSAND in visible
    assert NON_ASCII in visible
    assert "Tarn &amp; Sons" in rendered.html_for_email
    for name in (HOSTILE, AMPERSAND, NON_ASCII):
        assert name in rendered.text


def test_every_image_has_alt_text_and_a_matching_source(rendered: RenderedDigest) -> None:
    email_page = BeautifulSoup(rendered.html_for_email, "html.parser")
    files_page = BeautifulSoup(rendered.html_for_files, "html.parser")
    email_sources = [img["src"] for img in email_page.find_all("img")]
    file_sources = [img["src"] for img in files_page.find_all("img")]
    assert email_sources == [f"cid:{image.cid}" for image in rendered.images]
    assert file_sources == [image.filename for image in rendered.images]
    for img in email_page.find_all("img"):
        assert str(img.get("alt", "")).strip()
    # 5 new alerts + 1 heatmap (the one-instrument group has none) + 1 group history.
    assert len(rendered.images) == 7


def test_alert_chart_alt_text_carries_its_key_numbers(rendered: RenderedDigest) -> None:
    alt = rendered.images[0].alt  # alert 13, first after sorting
    assert "VRX / TARN" in alt
    assert "value 0.86" in alt and "band 0.76 to 0.93" in alt
    assert "level 0.80" in alt and "clears at 0.70" in alt and "since 2026-03-03" in alt


# --- plain text ----------------------------------------------------------------------


def test_text_part_carries_the_same_alert_facts(rendered: RenderedDigest) -> None:
    text = rendered.text
    ctx = _context()
    for alert in [*ctx.new_alerts, *ctx.continuing, *ctx.acknowledged, *ctx.cleared]:
        assert f"{alert.a.symbol} / {alert.b.symbol}" in text
        assert format_corr(alert.value) in text
    assert "band 0.73 to 0.90" in text  # alert 12
    assert "Level:      above 0.80   clears at 0.70" in text
    assert "p-value 0.004" in text
    assert "m.ferrante" in text and "hedge ratio under review" in text
    # Drivers: five lines per new alert with both returns.
    driver_lines = re.findall(r"^    2026-\d\d-\d\d +\S+ % +\S+ % +\S+$", text, flags=re.M)
    assert len(driver_lines) == 5 * len(ctx.new_alerts)
    assert "0.70 %      -1.40 %" in text


def test_text_part_writes_the_ascii_minus_a_spreadsheet_reads_and_html_keeps_the_sign(
    rendered: RenderedDigest,
) -> None:
    """Pasted into a spreadsheet, "\u22120.36" arrives as text and "-0.36" as a number; the
    HTML may keep the typographic minus (it lines up with "+")."""
    assert "\u2212" not in rendered.text
    assert re.search(r"change +-0\.36", rendered.text)
    assert "\u22120.36" in rendered.html_for_email


def test_text_part_carries_movers_group_averages_matrix_and_data_issues(
    rendered: RenderedDigest,
) -> None:
    text = rendered.text
    assert re.search(r"KLV / ZRL +ewma:hl=21 +now +0\.12 +before +0\.48 +change +-0\.36", text)
    assert re.search(
        r"Kelvara core +now +0\.44 +before +0\.31 +change +\+0\.13 +pairs 3 of 3", text
    )
    assert "One instrument only" in text
    assert "restated  TARN       2026-03-04 close 41.20 restated to 14.20" in text
    assert "stale     ZRL" in text
    assert "New alerts".upper() in text and "ABOUT THESE NUMBERS" in text


def test_empty_sections_say_so() -> None:
    ctx = _context(new_alerts=[], continuing=[], acknowledged=[], cleared=[], movers=[],
                   data_quality=[])
    result = render_digest(ctx)
    page = BeautifulSoup(result.html_for_email, "html.parser")
    for section_id in ("new-alerts", "still-open", "acknowledged", "cleared-today", "movers"):
        section = page.find(id=section_id)
        assert isinstance(section, Tag) and section.select_one(".empty") is not None
    assert "No data problems found." in result.text
    assert result.text.count("None today.") == 5


# --- subject and context checks -------------------------------------------------------


def test_subject_names_desk_date_and_counts(rendered: RenderedDigest) -> None:
    assert rendered.subject == (
        "Kelvara Rates & Hedges: correlation digest 2026-03-05 \u2014 "
        "5 new, 2 still open, 1 cleared"
    )


def test_subject_is_one_line_and_flags_data_attention() -> None:
    ctx = _context(desk="Kelvara\r\nBcc: x@kelvara.invalid", data_attention=True)
    subject = digest_subject(ctx)
    assert "\n" not in subject and "\r" not in subject
    assert subject.endswith("check data first")


def test_unknown_severity_is_refused_with_its_value() -> None:
    with pytest.raises(ConfigError, match="severity: 'urgent'"):
        _alert(1, "urgent", KLV, ORMA, value=0.9)


def test_confidence_level_outside_zero_one_is_refused() -> None:
    with pytest.raises(ConfigError, match="confidence_level: 95"):
        DigestParameters(("rolling:63",), (63.0,), "log", confidence_level=95)


# --- email message -------------------------------------------------------------------


def _message(rendered: RenderedDigest) -> EmailMessage:
    return build_message(
        rendered, sender="digest@kelvara.invalid",
        recipients=["risk@kelvara.invalid", "pm@kelvara.invalid"],
        date=datetime(2026, 3, 5, 18, 31, tzinfo=UTC), message_id_domain="kelvara.invalid",
    )


def test_message_is_alternative_with_text_first_and_related_html(rendered: RenderedDigest) -> None:
    msg = email.message_from_bytes(_message(rendered).as_bytes(), policy=default_policy)
    assert msg.get_content_type() == "multipart/alternative"
    text_part, related = msg.get_payload()  # type: ignore[misc]
    assert text_part.get_content_type() == "text/plain"
    assert related.get_content_type() == "multipart/related"
    html_part, *images = related.get_payload()
    assert html_part.get_content_type() == "text/html"
    assert [part.get_content_type() for part in images] == ["image/png"] * len(rendered.images)
    for part in images:
        assert part.get_content_disposition() == "inline"
    cids = {part["Content-ID"].strip("<>") for part in images}
    referenced = set(re.findall(r'src="cid:([^"]+)"', html_part.get_content()))
    assert referenced == cids
    assert text_part.get_content() .replace("\r\n", "\n") == rendered.text
    assert msg["Subject"] == rendered.subject
    assert msg["Date"] == "Thu, 05 Mar 2026 18:31:00 +0000"
    assert msg["To"] == "risk@kelvara.invalid, pm@kelvara.invalid"


def test_message_id_is_derived_from_content_so_a_resend_keeps_it(rendered: RenderedDigest) -> None:
    first, second = _message(rendered), _message(rendered)
    assert first["Message-ID"] == second["Message-ID"]
    assert first["Message-ID"].endswith("@kelvara.invalid>")
    other = _message(render_digest(_context(movers=[])))
    assert other["Message-ID"] != first["Message-ID"]


def test_message_refuses_naive_date_and_bad_addresses(rendered: RenderedDigest) -> None:
    with pytest.raises(ConfigError, match="date: 2026-03-05T18:31:00 has no time zone"):
        build_message(rendered, sender="d@kelvara.invalid", recipients=["r@kelvara.invalid"],
                      date=datetime(2026, 3, 5, 18, 31))
    with pytest.raises(ConfigError, match="recipients: no address"):
        build_message(rendered, sender="d@kelvara.invalid", recipients=[],
                      date=datetime(2026, 3, 5, 18, 31, tzinfo=UTC))
    with pytest.raises(ConfigError, match="recipients: 'r@k.invalid\\\\nBcc: x'"):
        build_message(rendered, sender="d@kelvara.invalid", recipients=["r@k.invalid\nBcc: x"],
                      date=datetime(2026, 3, 5, 18, 31, tzinfo=UTC))


def test_large_group_matrix_goes_to_a_csv_attachment() -> None:
    n = MATRIX_TABLE_MAX + 3
    symbols = tuple(f"QNB{i:02d}" for i in range(n))
    rng = np.random.default_rng(5)
    factors = rng.normal(size=(120, 2))
    data = factors[:, [i % 2 for i in range(n)]] + rng.normal(size=(120, n))
    matrix = np.corrcoef(data.T)
    ctx = _context(heatmaps=[HeatmapView("Quenby consumer", symbols, matrix)])
    result = render_digest(ctx)
    assert len(result.attachments) == 1
    attachment = result.attachments[0]
    assert attachment.content_type == "text/csv"
    page = BeautifulSoup(result.html_for_email, "html.parser")
    assert page.select_one("#group-matrices table.matrix") is None
    assert attachment.filename in page.select_one("#group-matrices").get_text()  # type: ignore[union-attr]
    rows = list(csv.reader(io.StringIO(attachment.data.decode("utf-8"))))
    header = rows[0][1:]
    assert sorted(header) == sorted(symbols)
    position = {s: i for i, s in enumerate(symbols)}
    for row in rows[1:]:
        for column, cell in zip(header, row[1:], strict=True):
            expected = matrix[position[row[0]], position[column]]
            assert float(cell) == pytest.approx(expected, abs=5e-5)
    msg = email.message_from_bytes(_message(result).as_bytes(), policy=default_policy)
    assert msg.get_content_type() == "multipart/mixed"
    alternative, csv_part = msg.get_payload()  # type: ignore[misc]
    assert alternative.get_content_type() == "multipart/alternative"
    assert csv_part.get_content_type() == "text/csv"
    assert csv_part.get_filename() == attachment.filename


def test_write_digest_writes_html_with_its_images_beside_and_eml(
    rendered: RenderedDigest, tmp_path: Path
) -> None:
    paths = write_digest(rendered, tmp_path / "out")
    page = BeautifulSoup(paths.html.read_text(encoding="utf-8"), "html.parser")
    for img in page.find_all("img"):
        target = paths.html.parent / str(img["src"])
        assert target.is_file()
        assert target.read_bytes().startswith(png_charts.PNG_SIGNATURE)
    assert paths.text.read_text(encoding="utf-8") == rendered.text
    saved = email.message_from_bytes(paths.eml.read_bytes(), policy=default_policy)
    assert saved.get_content_type() == "multipart/alternative"
    assert saved["Subject"] == rendered.subject


# --- charts --------------------------------------------------------------------------


def test_charts_are_png_at_twice_their_display_size(rendered: RenderedDigest) -> None:
    for image in rendered.images:
        assert image.png.startswith(png_charts.PNG_SIGNATURE)
        assert png_charts.png_size(image.png) == (2 * image.width, 2 * image.height)
    first = rendered.images[0]
    assert (first.width, first.height) == (640, 220)


def test_alert_chart_draws_nan_gaps_and_is_byte_for_byte_repeatable() -> None:
    history = _history(gap=slice(0, 30))
    args = (history.dates, history.values, history.band_low, history.band_high)
    one = png_charts.alert_history_chart(*args, level=0.8, clear_level=0.7, start=AS_OF)
    two = png_charts.alert_history_chart(*args, level=0.8, clear_level=0.7, start=AS_OF)
    assert one.png == two.png
    empty = np.full(10, np.nan)
    blank = png_charts.alert_history_chart(_days(10), empty, empty, empty)
    assert blank.png.startswith(png_charts.PNG_SIGNATURE)


def test_charts_are_8_bit_palette_pngs_a_third_the_size_of_full_colour_ones() -> None:
    history = _history()
    args = (history.dates, history.values, history.band_low, history.band_high)
    image = png_charts.alert_history_chart(*args, level=0.8, clear_level=0.7, start=AS_OF)
    bit_depth, colour_type = image.png[24], image.png[25]  # IHDR, after width and height
    assert (bit_depth, colour_type) == (8, 3)  # 8-bit indexed colour (PNG spec, 11.2.2)
    full = io.BytesIO()
    png_charts.alert_history_figure(*args, level=0.8, clear_level=0.7, start=AS_OF).savefig(
        full, format="png", dpi=png_charts.DPI)
    assert png_charts.png_size(full.getvalue()) == png_charts.png_size(image.png)
    assert len(image.png) < 0.5 * len(full.getvalue())


def test_cluster_order_puts_two_interleaved_blocks_together() -> None:
    # Members of block A at even positions, block B at odd ones: r = 0.8 within a block,
    # 0.1 across. Any good ordering makes each block contiguous.
    n = 10
    block = np.arange(n) % 2
    matrix = np.where(block[:, None] == block[None, :], 0.8, 0.1)
    np.fill_diagonal(matrix, 1.0)
    order = png_charts.cluster_order(matrix)
    labels = block[order]
    assert sorted(order.tolist()) == list(range(n))
    assert np.count_nonzero(np.diff(labels)) == 1


def test_cluster_order_treats_unknown_pairs_as_unrelated() -> None:
    matrix = np.array([
        [1.0, np.nan, 0.9, np.nan],
        [np.nan, 1.0, np.nan, 0.9],
        [0.9, np.nan, 1.0, np.nan],
        [np.nan, 0.9, np.nan, 1.0],
    ])
    order = png_charts.cluster_order(matrix).tolist()
    assert abs(order.index(0) - order.index(2)) == 1
    assert abs(order.index(1) - order.index(3)) == 1


def test_average_linkage_matches_scipy_on_seeded_points() -> None:
    # scipy.cluster.hierarchy.linkage(method="average") is the general-purpose reference
    # (test dependency only; comove's runtime code is numpy).
    from scipy.cluster.hierarchy import leaves_list, linkage
    from scipy.spatial.distance import squareform

    rng = np.random.default_rng(21)
    points = rng.normal(size=(25, 3))
    distance = np.sqrt(((points[:, None, :] - points[None, :, :]) ** 2).sum(axis=-1))
    expected = linkage(squareform(distance, checks=False), method="average")
    ours = png_charts.average_linkage(distance)
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-12)
    assert png_charts.leaf_order(ours).tolist() == leaves_list(expected).tolist()


def test_heatmap_needs_two_instruments_and_draws_two() -> None:
    with pytest.raises(ValueError, match="at least 2 instruments"):
        png_charts.heatmap_chart(["KLV"], np.ones((1, 1)))
    image, names = png_charts.heatmap_chart(["KLV", "ORMA"], np.array([[1.0, 0.3], [0.3, 1.0]]))
    assert sorted(names) == ["KLV", "ORMA"]
    assert png_charts.png_size(image.png) == (2 * image.width, 2 * image.height)


def test_group_average_chart_handles_all_nan_history() -> None:
    image = png_charts.group_average_chart(_days(5), [math.nan] * 5)
    assert png_charts.png_size(image.png) == (640, 240)


# --- benchmark -----------------------------------------------------------------------


def test_benchmark_quick_json_reports_its_figures(capsys: pytest.CaptureFixture[str]) -> None:
    assert digest_speed.main(["--quick", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["instruments"] == 20 and figures["groups"] == 2
    assert figures["new_alerts"] == 3
    # 3 alert charts + 2 heatmaps + 2 group histories.
    assert figures["images"] == 7
    assert figures["target_seconds"] == 10.0
    assert figures["total_seconds"] > 0
    assert isinstance(figures["within_target"], bool)


def test_instruments_without_names_print_no_empty_brackets() -> None:
    unnamed_a, unnamed_b = Instrument("QAV", ""), Instrument("QBX", "")
    context = _context(new_alerts=[
        _alert(51, "warning", unnamed_a, unnamed_b, value=0.84),
        _alert(52, "warning", KLV, unnamed_b, value=0.85),
    ], continuing=[], acknowledged=[], cleared=[])
    text = render_digest(context).text
    assert "( / )" not in text and "()" not in text
    assert re.search(r"\] QAV / QBX *\n", text)
    # one named side: the other shown by its symbol, never an empty slot
    assert "KLV / QBX  (Kelvara Industrial / QBX)" in text
    html = _squash(BeautifulSoup(render_digest(context).html_for_email,
                                 "html.parser").get_text(" "))
    assert "( / )" not in html and "()" not in html


def test_matrix_csv_writes_the_ascii_minus() -> None:
    from monitor.digest.figures import _matrix_csv

    data = _matrix_csv(["KLV", "ORMA"], np.array([[1.0, -0.25], [-0.25, 1.0]])).decode()
    assert "KLV,1.0000,-0.2500" in data and "\u2212" not in data
