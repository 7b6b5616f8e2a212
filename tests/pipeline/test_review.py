"""What the desk does from the shell: mutes listed, lifted and set on past days for a
backfill, acknowledgements withdrawn, the alerts table with a unit on every number, and
`series` defaulting to the settings' measures."""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from monitor.alerts.units import threshold_text, value_text
from monitor.cli import main
from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.errors import ComoveError
from monitor.pipeline import (
    acknowledge,
    evaluate_range,
    ingest_file,
    init_store,
    list_mutes,
    mute,
    unacknowledge,
    unmute,
)
from storage import Store
from storage import alerts as alerts_store
from tests.scenarios import BREAK_START, INSTRUMENTS, RULES, break_scenario

NOW = dt.datetime(2024, 1, 5, 9, tzinfo=dt.UTC)
TODAY = dt.date(2024, 1, 5)


@pytest.fixture(scope="module")
def closes_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    path = tmp_path_factory.mktemp("closes") / "closes.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    return path


@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings],
         closes_csv: Path) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", INSTRUMENTS + RULES)
    store = init_store(settings)
    ingest_file(store, settings, closes_csv, today=TODAY)
    yield store, settings
    store.dispose()


def _announced(store: Store, rule: str) -> dict[dt.date, bool]:
    with store.connect() as conn:
        ids = {a.id for a in alerts_store.list_alerts(conn, rule=rule)}
        events = alerts_store.events_for(conn)
    return {e["date"]: bool(e["announce"]) for e in events if e["alert_id"] in ids}


def test_a_past_mute_needs_allow_past_and_then_mutes_history_on_replay(
    desk: tuple[Store, Settings]
) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    loud = _announced(store, "hedge-break")
    assert any(loud.values()), "the planted break must announce something"
    first, last = min(loud), max(loud)
    with pytest.raises(ComoveError, match=r"--until: .* is before today \(2024-01-05\); add "
                                          r"--allow-past"):
        mute(store, settings, rule="hedge-break", pair=None, until=last, reason="rebuild",
             from_on=first, now=NOW)
    with pytest.raises(ComoveError, match="--until: .* is before the first muted day"):
        mute(store, settings, rule="hedge-break", pair=None, until=first, reason="rebuild",
             from_on=last, allow_past=True, now=NOW)
    mute(store, settings, rule="hedge-break", pair=None, until=last, reason="hedge rebuilt",
         from_on=first, allow_past=True, now=NOW)
    evaluate_range(store, settings, None, None, force=True)
    quiet = _announced(store, "hedge-break")
    assert quiet.keys() == loud.keys() and not any(quiet.values())


def test_mutes_are_listed_lifted_and_kept_in_the_history(
    desk: tuple[Store, Settings]
) -> None:
    store, settings = desk
    active = mute(store, settings, rule="hedge-break", pair=None, until=dt.date(2024, 2, 1),
                  reason="hedge being rebuilt", from_on=dt.date(2024, 1, 2),
                  allow_past=True, now=NOW)
    coming = mute(store, settings, rule=None, pair="DUNQ/KLV", until=dt.date(2024, 3, 1),
                  reason="index rebalance", from_on=dt.date(2024, 2, 20), now=NOW)
    ended = mute(store, settings, rule="hedge-jump", pair=None, until=dt.date(2023, 12, 1),
                 reason="old", from_on=dt.date(2023, 11, 1), allow_past=True, now=NOW)
    shown = list_mutes(store, settings, now=NOW)
    assert shown["id"].tolist() == [active, coming]
    assert shown["state"].tolist() == ["active", "coming"]
    assert shown["target"].tolist() == ["-", "KLV/DUNQ"]
    every = list_mutes(store, settings, include_ended=True, now=NOW)
    assert every.set_index("id").loc[ended, "state"] == "ended"

    said = unmute(store, settings, active, now=NOW)
    assert said == (f"mute {active} (hedge-break) lifted: it muted 2024-01-02 to 2024-01-04; "
                    "alerts are announced again from today")
    with store.connect() as conn:
        kept = alerts_store.get_mute(conn, active)
    assert kept is not None and kept["until"] == dt.date(2024, 1, 4)  # history keeps it
    assert "removed" in unmute(store, settings, coming, now=NOW)
    with store.connect() as conn:
        assert alerts_store.get_mute(conn, coming) is None
    assert list_mutes(store, settings, now=NOW).empty
    with pytest.raises(ComoveError, match="already ended on 2023-12-01"):
        unmute(store, settings, ended, now=NOW)
    with pytest.raises(ComoveError, match="mute 999 does not exist"):
        unmute(store, settings, 999, now=NOW)


def test_unack_puts_an_alert_back_on_the_needs_attention_list(
    desk: tuple[Store, Settings]
) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    with store.connect() as conn:
        alert = alerts_store.list_alerts(conn, rule="hedge-break")[0]
    acknowledge(store, settings, alert.id, by="R. Vell", note="seen", now=NOW)
    back = unacknowledge(store, settings, alert.id)
    assert back.acknowledged_by is None and back.state == alert.state
    with store.connect() as conn:
        assert alerts_store.list_acknowledgements(conn, [alert.id]) == []
        assert (alert.rule, alert.target, alert.opened_on) not in \
            alerts_store.acknowledgement_index(conn)
    with pytest.raises(ComoveError, match=f"alert {alert.id} is not acknowledged"):
        unacknowledge(store, settings, alert.id)


def test_cli_mute_mutes_unmute_and_unack(
    desk: tuple[Store, Settings], capsys: pytest.CaptureFixture[str]
) -> None:
    store, settings = desk
    config = str(settings.path)
    assert main(["mute", "--rule", "hedge-break", "--from", "2023-03-01", "--until",
                 "2023-06-30", "--reason", "history", "--config", config]) == 1
    assert "add --allow-past" in capsys.readouterr().err
    assert main(["mute", "--rule", "hedge-break", "--until", "2099-06-30", "--reason",
                 "rebuild", "--config", config]) == 0
    out = capsys.readouterr().out
    assert out.startswith("mute 1: hedge-break until 2099-06-30 (comove unmute 1 lifts it)")
    assert main(["mutes", "--config", config, "--format", "json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert listed[0]["until"] == "2099-06-30" and listed[0]["target"] == "-"
    assert main(["unmute", "1", "--config", config]) == 0
    assert "mute 1 (hedge-break) removed" in capsys.readouterr().out
    assert main(["mutes", "--all", "--config", config]) == 0
    assert capsys.readouterr().out.strip() == "(none)"
    evaluate_range(store, settings, None, None)
    assert main(["ack", "1", "--by", "R. Vell", "--config", config]) == 0
    assert main(["unack", "1", "--config", config]) == 0
    assert "is no longer acknowledged" in capsys.readouterr().out


def test_alerts_table_gives_every_number_its_unit_and_no_none(
    desk: tuple[Store, Settings], capsys: pytest.CaptureFixture[str]
) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    config = str(settings.path)
    assert main(["alerts", "--all", "--config", config]) == 0
    table = capsys.readouterr().out
    header = table.splitlines()[0].split()
    assert header == ["id", "state", "severity", "rule", "target", "first_breach", "opened",
                      "cleared", "value", "peak", "threshold", "acknowledged_by"]
    assert "None" not in table and "nan" not in table
    level_rows = [line for line in table.splitlines() if "hedge-break" in line]
    assert level_rows and all(line.count(" corr") == 3 for line in level_rows)
    assert all("+0.300 corr" in line for line in level_rows)  # the rule's `below`
    jump_rows = [line for line in table.splitlines() if "hedge-jump" in line]
    assert all("change 0.400 corr" in line for line in jump_rows)
    assert main(["alerts", "--all", "--format", "json", "--config", config]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows[0]["opened"] >= BREAK_START.isoformat() and len(rows[0]["opened"]) == 10
    assert {row["kind"] for row in rows} <= {"level", "jump"}
    assert all(isinstance(row["threshold"], float) for row in rows)
    # the first breach as well as the opening: a level rule with hold = 3 opens on the
    # third day below its level
    level = [row for row in rows if row["rule"] == "hedge-break"]
    assert level and all(len(row["first_breach"]) == 10 for row in level)
    with store.connect() as conn:
        stored = {a.id: a for a in alerts_store.list_alerts(conn)}
    for row in level:
        alert = stored[row["id"]]
        assert row["first_breach"] == alert.first_breach_on.isoformat()
        assert row["opened"] == alert.opened_on.isoformat()
        assert alert.first_breach_on < alert.opened_on
        assert row["value"] == alert.last_value  # full precision, no rounding


@pytest.mark.parametrize(
    ("kind", "value", "threshold", "value_text_", "threshold_text_"),
    [("level", 0.2999, 0.3, "+0.300 corr", "+0.300 corr"),
     ("shift", -0.1, 4.29, "-0.100 corr", "|z| 4.29"),
     ("stale", 3.0, 3.0, "3 days", "3 days"),
     ("stale", 1.0, 1.0, "1 day", "1 day"),
     ("cusum", 0.71, 12.5, "+0.710 corr", "evidence 12.50"),
     ("sign", 0.05, 0.0, "+0.050 corr", "sign change"),
     ("level", float("nan"), None, "-", "-")],
)
def test_units_by_rule_kind(kind: str, value: float, threshold: float | None,
                            value_text_: str, threshold_text_: str) -> None:
    assert value_text(kind, value) == value_text_
    assert threshold_text(kind, threshold) == threshold_text_


def test_series_defaults_to_the_settings_measures(
    desk: tuple[Store, Settings], capsys: pytest.CaptureFixture[str]
) -> None:
    _, settings = desk
    config = str(settings.path)
    assert main(["series", "KLV", "DUNQ", "--start", "2023-12-01", "--format", "csv",
                 "--config", config]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "date,measure,value,low,high,n"
    measures = {line.split(",")[1] for line in lines[1:]}
    assert measures == set(settings.correlation.measures) == {"rolling:63", "ewma:hl=21"}
    assert main(["series", "KLV", "DUNQ", "--measure", "rolling:21", "--start", "2023-12-01",
                 "--format", "csv", "--config", config]) == 0
    only = capsys.readouterr().out.splitlines()
    assert {line.split(",")[1] for line in only[1:]} == {"rolling:21"}
    assert only[1].startswith("2023-12-01,rolling:21,")


def test_series_json_and_csv_have_the_same_fields_and_every_digit(
    desk: tuple[Store, Settings], capsys: pytest.CaptureFixture[str]
) -> None:
    import csv
    import io

    from monitor.pipeline import series

    store, settings = desk
    config = str(settings.path)
    args = ["series", "KLV", "DUNQ", "--measure", "ewma:hl=21", "--start", "2023-11-01",
            "--config", config]
    assert main([*args, "--format", "json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert main([*args, "--format", "csv"]) == 0
    table = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    frame = series(store, settings, "KLV", "DUNQ", "ewma:hl=21",
                   start=dt.date(2023, 11, 1))
    assert list(rows[0]) == list(table[0]) == ["date", "measure", "value", "low", "high", "n"]
    assert len(rows) == len(table) == len(frame)
    for row, line, value in zip(rows, table, frame["value"], strict=True):
        assert row["date"] == line["date"] and len(row["date"]) == 10
        # every digit: the JSON number and the CSV text are the same double as the frame's
        assert row["value"] == float(line["value"]) == value


def test_pages_show_the_mutes_on_the_index_and_on_the_muted_pages(
    desk: tuple[Store, Settings], tmp_path: Path
) -> None:
    from bs4 import BeautifulSoup

    from monitor.pages.paths import pair_page_path
    from monitor.pipeline import build_pages

    store, settings = desk
    evaluate_range(store, settings, None, None)
    rule_mute = mute(store, settings, rule="hedge-break", pair=None, until=dt.date(2099, 1, 1),
                     reason="hedge being rebuilt", now=dt.datetime.now(dt.UTC))
    pair_mute = mute(store, settings, rule=None, pair="KLV/DUNQ", until=dt.date(2099, 2, 1),
                     reason="index rebalance", from_on=dt.date(2099, 1, 10),
                     now=dt.datetime.now(dt.UTC))
    old = mute(store, settings, rule="hedge-jump", pair=None, until=dt.date(2023, 1, 1),
               reason="old", from_on=dt.date(2022, 6, 1), allow_past=True,
               now=dt.datetime.now(dt.UTC))
    out = tmp_path / "site"
    build_pages(store, settings, out)
    index = BeautifulSoup((out / "index.html").read_text(encoding="utf-8"), "html.parser")
    rows = index.select("#mute-table tbody tr")
    cells = [[td.get_text(strip=True) for td in row.find_all("td")] for row in rows]
    assert cells == [
        [str(rule_mute), "rule hedge-break", cells[0][2], "2099-01-01", "active",
         "hedge being rebuilt"],
        [str(pair_mute), "KLV/DUNQ under every rule", "2099-01-10", "2099-02-01", "coming",
         "index rebalance"],
    ]
    assert "1 ended mute not" in index.get_text(" ", strip=True)
    page = out / pair_page_path("KLV", "DUNQ")
    pair = BeautifulSoup(page.read_text(encoding="utf-8"), "html.parser")
    shown = [(row.find_all("td")[0].get_text(strip=True), row.find_all("td")[4].get_text())
             for row in pair.select("#page-mute-table tbody tr")]
    # The pair's own mute and the mutes of the rules with alerts on it, the ended one too:
    # the page's history shows alerts it kept from the digest.
    assert shown == [(str(rule_mute), "active"), (str(pair_mute), "coming"),
                     (str(old), "ended")]


def test_quiet_backfill_prints_no_progress(
    desk: tuple[Store, Settings], capsys: pytest.CaptureFixture[str]
) -> None:
    _, settings = desk
    config = str(settings.path)
    assert main(["-q", "backfill", "--no-pages", "--config", config]) == 0
    quiet = capsys.readouterr()
    assert "progress:" not in quiet.err and "evaluated " in quiet.out
    assert main(["backfill", "--no-pages", "--force", "--config", config]) == 0
    assert "progress: " in capsys.readouterr().err
