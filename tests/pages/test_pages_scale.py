"""The history pages at scale: charts for a bounded set of pairs, progress, one warning.

With thousands of alerted pairs, only the watch list (`[desk] watch`) and the
`charted_pairs` pairs with the most pressing alerts get charts (open alerts first, most
severe, latest); every other alerted pair still gets its page, with its alerts and events
and a note saying why there is no chart. The histories of the charted pairs come from one
engine call per measure and equal pandas' rolling Pearson correlation. The build logs its
progress, and a rule over a million pairs or more is named in a warning when it loads.

All data is simulated (seeded numpy); symbols are made up.
"""

from __future__ import annotations

import logging
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import parse_settings
from monitor.errors import ConfigError
from monitor.pages import SiteInputs, build_site, build_site_context
from monitor.pipeline import evaluate
from monitor.rules import build_rules
from storage.alerts import AlertRow

SYMBOLS = [f"ZP{k:02d}" for k in range(12)]
TABLE = {"name": "crowding", "kind": "level", "measure": "rolling:21", "all": True,
         "above": 0.5}


def _returns(days: int = 90) -> pd.DataFrame:
    rng = np.random.default_rng(23)
    index = pd.bdate_range(end=pd.Timestamp("2026-03-05"), periods=days)
    factor = rng.normal(0, 1, (days, 1))
    shocks = 0.7 * factor + 0.7 * rng.normal(0, 1, (days, len(SYMBOLS)))
    return pd.DataFrame(0.01 * shocks, index=index, columns=SYMBOLS)


def _alert(alert_id: int, target: str, opened: date, *, severity: str = "warning",
           cleared: date | None = None) -> AlertRow:
    return AlertRow(id=alert_id, rule="crowding", target=target, opened_on=opened,
                    first_breach_on=opened, rule_kind="level", severity=severity,
                    measure="rolling:21", state="cleared" if cleared else "open",
                    cleared_on=cleared, level=0.5, opened_value=0.6, peak_value=0.6,
                    peak_on=opened, last_value=0.6, last_on=opened, announced=True)


def _inputs(alerts: list[AlertRow], *, watch: tuple[str, ...] = (), charted: int = 3
            ) -> SiteInputs:
    rules = build_rules([TABLE], symbols=SYMBOLS, groups={})
    events = [{"alert_id": a.id, "date": a.opened_on, "event": "opened", "value": 0.6,
               "level": 0.5, "low": 0.4, "high": 0.7, "p": None, "n": 21, "z": None}
              for a in alerts]
    return SiteInputs(
        desk="Made-up Desk", generated_at=datetime(2026, 3, 5, 18, tzinfo=UTC),
        returns=_returns(), names={}, groups={}, rules=rules, rule_tables=[TABLE],
        alerts=alerts, events=events, acknowledgements=[], runs=[], digests=[],
        measures=["rolling:21"], return_kind="log", level=0.95, watch=watch,
        charted_pairs=charted,
    )


def _flood() -> list[AlertRow]:
    day = date(2026, 3, 5)
    labels = build_rules([TABLE], symbols=SYMBOLS, groups={})[0].targets.labels
    alerts = []
    for k, label in enumerate(list(labels)[:20]):
        opened = day - timedelta(days=k)
        # Every fourth alert has cleared; two are critical.
        cleared = opened + timedelta(days=1) if k % 4 == 3 else None
        severity = "critical" if k in (6, 9) else "warning"
        alerts.append(_alert(k + 1, label, opened, severity=severity, cleared=cleared))
    return alerts


def test_charts_only_for_the_watch_list_and_the_most_pressing_pairs() -> None:
    alerts = _flood()
    watched = "ZP11/ZP10"  # written backwards; the page is the alerts' "ZP10/ZP11"
    ctx = build_site_context(_inputs(alerts, watch=(watched,), charted=3))
    pages = {page.label: page for page in ctx.pairs}
    assert len(pages) == 21  # 20 alerted pairs and the watched one, each with a page
    charted = {label for label, page in pages.items() if page.measures}
    by_id = {a.id: a.target for a in alerts}
    # Critical open alerts first (ids 7 and 10), then the latest open warning (id 1).
    assert charted == {"ZP10/ZP11", by_id[7], by_id[10], by_id[1]}
    for label, page in pages.items():
        if label in charted:
            assert page.note == "" and page.measures[0].values.size == 90
        else:
            assert "Charts are drawn for the watch list and the 3 pairs" in page.note
            assert not page.drivers and page.events  # events kept, no drivers computed


def test_charted_histories_equal_pandas_rolling_correlation() -> None:
    returns = _returns()
    ctx = build_site_context(_inputs(_flood(), charted=5))
    shown = [page for page in ctx.pairs if page.measures]
    assert len(shown) == 5
    for page in shown:
        history = page.measures[0]
        # Outside reference: pandas' rolling Pearson correlation over 21 rows.
        expected = returns[page.a.symbol].rolling(21).corr(returns[page.b.symbol])
        np.testing.assert_allclose(history.values, expected.to_numpy(), atol=1e-9)
        assert np.all(history.band_low[20:] < history.values[20:])
        assert history.levels == (0.5, 0.45)


def test_uncharted_pair_pages_say_why_and_the_build_logs_progress(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    ctx = build_site_context(_inputs(_flood(), charted=2))
    with caplog.at_level(logging.INFO, logger="comove.pages"):
        report = build_site(ctx, tmp_path / "site", workers=1)
    lines = [r.getMessage() for r in caplog.records if r.name == "comove.pages"]
    assert lines[0].startswith("pages: ") and "2 charts to draw (0 unchanged)" in lines[0]
    assert lines[-1] == "pages: 2 of 2 charts drawn"
    assert sum(f.endswith(".svg") and f.startswith("pairs/") for f in report.files) == 2
    uncharted = next(page for page in ctx.pairs if not page.measures)
    from monitor.pages.paths import pair_page_path

    html = (tmp_path / "site" / pair_page_path(uncharted.a.symbol, uncharted.b.symbol)
            ).read_text()
    assert "Charts are drawn for the watch list" in html and "<svg" not in html


def test_watch_must_be_pairs() -> None:
    with pytest.raises(ConfigError, match=r"desk\.watch.*pairs written \"A/B\""):
        parse_settings({"desk": {"watch": ["ZP01"]}})
    settings = parse_settings({"desk": {"watch": ["ZP01/ZP02"], "charted_pairs": 10}})
    assert settings.desk.watch == ("ZP01/ZP02",) and settings.desk.charted_pairs == 10


def test_a_rule_over_many_pairs_is_named_in_one_warning(
    monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    settings = parse_settings({"rules": [TABLE]})
    monkeypatch.setattr(evaluate, "MANY_PAIRS", 66)  # 12 instruments: 66 pairs
    monkeypatch.setattr(evaluate, "_WARNED", set())
    with caplog.at_level(logging.WARNING, logger="comove.evaluate"):
        evaluate.build_plan(settings, SYMBOLS)
        evaluate.build_plan(settings, SYMBOLS)
        evaluate.build_plan(settings, SYMBOLS[:11])  # 55 pairs: below
    warnings = [r.getMessage() for r in caplog.records if r.name == "comove.evaluate"]
    assert warnings == [warnings[0]] and "rule crowding watches 66 pairs" in warnings[0]
