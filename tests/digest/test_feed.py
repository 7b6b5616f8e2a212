"""The digest's Data feed block (monitor.digest.feed): data alerts as what they are."""

from __future__ import annotations

import datetime as dt

from monitor.digest import AlertFacts
from monitor.digest.feed import FeedFacts, RefusedFile, build_feed

RUN = dt.date(2026, 3, 5)
NOW = dt.datetime(2026, 3, 5, 18, 30, tzinfo=dt.UTC)
DATES = [dt.date(2026, 3, d) for d in (2, 3, 4, 5)]  # Mon..Thu


def _alert(alert_id: int, rule: str, target: str, kind: str, opened: dt.date,
           state: str = "open", value: float | None = None) -> AlertFacts:
    return AlertFacts(id=alert_id, rule=rule, target=target, opened_on=opened,
                      first_breach_on=opened, state=state,
                      cleared_on=RUN if state == "cleared" else None, severity="warning",
                      rule_kind=kind, announced=True,
                      event_today=None if value is None else {"value": value})


def test_missing_instruments_stale_alerts_and_refused_files_are_listed_as_what_they_are(
) -> None:
    facts = FeedFacts(
        last_close={"KLV": RUN, "ORMA": dt.date(2026, 3, 2), "VESK": None},
        expected=["KLV", "ORMA", "VESK"],
        refused=[
            RefusedFile("old.csv", NOW - dt.timedelta(hours=25), ("old.csv:2: x",)),
            RefusedFile("new.csv", NOW - dt.timedelta(hours=2),
                        ("new.csv:2: close 'n/a' for KLV on 2026-03-05 is not a number",), 3),
            RefusedFile("now.csv", NOW + dt.timedelta(seconds=5), ("now.csv:1: y",)),
        ],
    )
    view = build_feed(RUN, facts, [("open", _alert(4, "stale-closes", "ORMA", "stale",
                                                    dt.date(2026, 3, 4), value=3.0))],
                      {"ORMA": "Orma Holdings"}, DATES, NOW)
    assert [(m.symbol, m.last_close, m.business_days) for m in view.missing] == [
        ("ORMA", dt.date(2026, 3, 2), 3), ("VESK", None, None)]
    assert view.missing[0].name == "Orma Holdings"
    assert [f.name for f in view.refused] == ["new.csv", "now.csv"]
    (stale,) = view.alerts
    assert stale.what == "no new or no changed close of ORMA since 2026-03-02 (3 business days)"
    assert stale.symbols == ("ORMA",) and stale.state == "open"
    assert not view.empty


def test_the_feed_alert_names_the_latest_closes_and_says_when_it_cleared() -> None:
    facts = FeedFacts(last_close={"KLV": dt.date(2026, 3, 3), "ORMA": dt.date(2026, 3, 3)},
                      expected=["KLV", "ORMA"])
    opened = build_feed(RUN, facts, [("new", _alert(9, "data-feed", "all", "stale", RUN))],
                        {}, DATES, NOW)
    (alert,) = opened.alerts
    assert alert.what == ("no closes for 2026-03-05 by run time; the latest closes are from "
                          "2026-03-03")
    assert alert.symbols == ("KLV", "ORMA")
    back = FeedFacts(last_close={"KLV": RUN, "ORMA": RUN}, expected=["KLV", "ORMA"])
    cleared = build_feed(RUN, back, [("cleared", _alert(9, "data-feed", "all", "stale",
                                                         dt.date(2026, 3, 4), "cleared"))],
                         {}, DATES, NOW)
    assert cleared.missing == () and cleared.alerts[0].what.startswith(
        "closes for 2026-03-05 arrived")


def test_nothing_to_say_leaves_the_block_empty() -> None:
    facts = FeedFacts(last_close={"KLV": RUN}, expected=["KLV"])
    assert build_feed(RUN, facts, [], {}, DATES, NOW).empty
    # No close expected (not a run date, or every market shut): nobody is missing.
    assert build_feed(RUN, FeedFacts(last_close={"KLV": dt.date(2026, 3, 2)}), [], {}, DATES,
                      NOW).empty
