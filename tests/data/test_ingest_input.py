"""Hostile and careless closes files: every problem a file can cause is a file:line message
and a rejection of that file (never an unforeseen error), symbols follow the settings' rule,
closes stay in a range that keeps returns finite, and a re-ingest is judged by content."""

from __future__ import annotations

import datetime as dt
import random
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.data.parse import MAX_CLOSE, MIN_CLOSE, parse_closes
from monitor.data.returns import closes_to_returns
from monitor.errors import IngestError
from monitor.pipeline import collect_inbox, ingest_file, init_store, read_closes
from monitor.pipeline.ingest import STORED_PROBLEMS
from storage import Store
from storage import closes as closes_store

TODAY = dt.date(2024, 3, 8)


def _write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def store(settings: Settings) -> Iterator[Store]:
    opened = init_store(settings)
    yield opened
    opened.dispose()


@pytest.fixture
def open_settings(store_url: str, write_settings: object) -> Settings:
    """Settings that accept symbols not listed under [[instruments]]."""
    from tests.conftest import DESK_TOML

    return write_settings(  # type: ignore[operator, no-any-return]
        store_url, DESK_TOML + "\n[sources]\nallow_new_symbols = true\n")


def _stored(store: Store) -> pd.DataFrame:
    with store.connect() as conn:
        return closes_store.read_closes_long(conn)


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ("date,Date,KLV\n2024-03-04,2024-03-04,100\n",
         "prices.csv:1: column 'Date' appears twice in the header (columns 1 and 2)"),
        ("date,symbol,close,Close\n2024-03-04,KLV,100,101\n",
         "prices.csv:1: column 'Close' appears twice in the header (columns 3 and 4)"),
        ("date,KLV,ORMA,KLV\n2024-03-04,100,50,101\n",
         "prices.csv:1: column 'KLV' appears twice in the header (columns 2 and 4)"),
        ("date,KLV,\n2024-03-04,100,\n", "prices.csv:1: column 3 has no name"),
        ("date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,101,5\n",
         "prices.csv:3: 4 fields where the header has 3; a decimal comma? write closes with "
         "a decimal point (101.5) or quote the value"),
        ('date,symbol,close\n2024-03-04,KLV,"101,5"\n',
         "prices.csv:2: close '101,5' for KLV on 2024-03-04 is not a number (a decimal "
         "comma? write it with a decimal point)"),
        ('date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,"KLV,101\n',
         'prices.csv:3: a quote (") opens a field that is never closed'),
        ("date,symbol,close\n2024-03-04,KLV,1e-320\n",
         "prices.csv:2: close '1e-320' for KLV on 2024-03-04 is outside the accepted range "
         "1e-12 to 1e+15"),
        ("date,symbol,close\n2024-03-04,KLV,1e16\n",
         "prices.csv:2: close '1e16' for KLV on 2024-03-04 is outside the accepted range"),
        ("date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,0.001\n",
         "prices.csv:3: close 0.001 for KLV on 2024-03-05 is 1e+05 times its neighbouring "
         "close 100; refused as implausible"),
        ("date,symbol,close,source\n2024-03-04,KLV,100," + "s" * 201 + "\n",
         "prices.csv:2: source '" + "s" * 37 + "...' for KLV on 2024-03-04 is longer than 200 "
         "characters"),
        ("date,symbol,close\n2024-03-04,KLV,1\x00\n",
         "prices.csv:2: a NUL byte; this is not a text CSV file"),
    ],
)
def test_each_bad_file_is_a_located_rejection_and_writes_nothing(
    store: Store, settings: Settings, tmp_path: Path, body: str, message: str
) -> None:
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, _write(tmp_path / "prices.csv", body), today=TODAY)
    reported = [str(info.value), *info.value.problems]
    assert any(line.startswith(message) for line in reported), reported
    assert all("\n" not in line for line in reported)
    assert _stored(store).empty


def test_format_wide_on_a_long_file_is_a_clean_error(store: Store, settings: Settings,
                                                     tmp_path: Path) -> None:
    path = _write(tmp_path / "long.csv", "date,symbol,close\n2024-03-04,KLV,100\n")
    with pytest.raises(IngestError, match=r"^long.csv:1: the header \(date, symbol, close\) "
                       r"is the long layout .* use --format long or auto$"):
        ingest_file(store, settings, path, layout="wide", today=TODAY)


def test_a_repeated_wide_column_never_becomes_a_made_up_symbol(
    store: Store, open_settings: Settings, tmp_path: Path
) -> None:
    opened = init_store(open_settings)
    path = _write(tmp_path / "w.csv", "date,KLV,KLV\n2024-03-04,100,101\n")
    with pytest.raises(IngestError, match="appears twice"):
        ingest_file(opened, open_settings, path, today=TODAY)
    with opened.connect() as conn:
        assert "KLV.1" not in {i.symbol for i in closes_store.list_instruments(conn)}
    opened.dispose()


def test_a_wide_column_named_line_is_a_symbol_not_dropped(
    store: Store, settings: Settings, open_settings: Settings, tmp_path: Path
) -> None:
    path = _write(tmp_path / "w.csv", "date,KLV,line\n2024-03-04,100,7\n")
    # Not configured: reported like any other unknown symbol.
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, path, today=TODAY)
    assert info.value.problems == [
        "w.csv:2: symbol 'line' on 2024-03-04 is not a configured instrument"]
    # Allowed: stored under its name.
    opened = init_store(open_settings)
    report = ingest_file(opened, open_settings, path, today=TODAY)
    assert report.closes_new == 2
    assert read_closes(opened).loc["2024-03-04", "line"] == 7.0
    opened.dispose()


@pytest.mark.parametrize(
    ("symbol", "shown"),
    [("K" * 65, "K" * 37 + "..."), ("K\tV", "K\\tV"), ("K;V", "K;V")],
)
def test_symbols_follow_the_settings_rule_at_ingest_on_every_store(
    store: Store, open_settings: Settings, tmp_path: Path, symbol: str, shown: str
) -> None:
    # The 65-character symbol used to reach PostgreSQL's VARCHAR(64) as an unforeseen error.
    opened = init_store(open_settings)
    body = f'date,symbol,close\n2024-03-04,"{symbol}",100\n'
    with pytest.raises(IngestError) as info:
        ingest_file(opened, open_settings, _write(tmp_path / "s.csv", body), today=TODAY)
    assert info.value.problems == [
        f"s.csv:2: symbol '{shown}' is not a valid symbol "
        "(1 to 64 characters without spaces, commas, ';' or control characters)"]
    assert _stored(opened).empty
    ok = "K" * 64
    report = ingest_file(opened, open_settings,
                         _write(tmp_path / "ok.csv", f"date,symbol,close\n2024-03-04,{ok},1\n"),
                         today=TODAY)
    assert report.closes_new == 1
    opened.dispose()


def test_a_close_far_off_its_stored_neighbour_is_refused(store: Store, settings: Settings,
                                                         tmp_path: Path) -> None:
    ingest_file(store, settings, _write(tmp_path / "a.csv",
                                        "date,symbol,close\n2024-03-04,KLV,100\n"), today=TODAY)
    bad = _write(tmp_path / "b.csv", "date,symbol,close\n2024-03-05,KLV,2000000\n")
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, bad, today=TODAY)
    assert info.value.problems == [
        "b.csv:2: close 2e+06 for KLV on 2024-03-05 is 2e+04 times its neighbouring close "
        "100; refused as implausible (more than 10000 times)"]
    # A big move below the limit is accepted and flagged, as before.
    flagged = ingest_file(store, settings, _write(
        tmp_path / "c.csv", "date,symbol,close\n2024-03-05,KLV,300\n"), today=TODAY)
    assert flagged.closes_new == 1 and len(flagged.suspects) == 1


def test_returns_are_finite_even_from_a_stored_extreme_close() -> None:
    # A store written before the range check may hold such a close: no inf reaches a rule.
    panel = pd.DataFrame({"KLV": [100.0, 1e-320, 100.0], "ORMA": [1.0, 1e300, 1e-300]},
                         index=pd.date_range("2024-03-04", periods=3))
    for kind in ("log", "simple"):
        out = closes_to_returns(panel, kind=kind)  # type: ignore[arg-type]
        assert not np.isinf(out.to_numpy()).any(), kind
    # Within the accepted range, the extreme ratio is finite by construction.
    ratio = np.float64(MAX_CLOSE) / np.float64(MIN_CLOSE)
    assert np.isfinite(ratio - 1.0) and np.isfinite(np.log(ratio))


def test_an_empty_close_in_the_long_layout_is_no_close_and_reported(
    store: Store, settings: Settings, tmp_path: Path
) -> None:
    body = "date,symbol,close\n2024-03-04,KLV,100\n2024-03-04,ORMA,\n2024-03-05,ORMA,51\n"
    report = ingest_file(store, settings, _write(tmp_path / "p.csv", body), today=TODAY)
    assert (report.closes_new, report.rows_rejected) == (2, 0)
    assert report.notes == [
        "p.csv:3: close is empty for ORMA on 2024-03-04; read as no close that day"]
    assert pd.isna(read_closes(store).loc["2024-03-04", "ORMA"])


def test_skip_bad_reports_both_lines_of_a_conflicting_duplicate(
    store: Store, settings: Settings, tmp_path: Path
) -> None:
    body = ("date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,101\n"
            "2024-03-05,KLV,102\n2024-03-04,ORMA,50\n")
    report = ingest_file(store, settings, _write(tmp_path / "p.csv", body), skip_bad=True,
                         today=TODAY)
    assert report.problems == [
        "p.csv:3: close '101' for KLV on 2024-03-05 conflicts with 102 on line 4; both lines "
        "are left out",
        "p.csv:4: close '102' for KLV on 2024-03-05 conflicts with 101 on line 3",
    ]
    assert (report.closes_new, report.rows_rejected) == (2, 2)


def test_reingesting_the_original_after_a_restatement_puts_it_back(
    store: Store, settings: Settings, tmp_path: Path
) -> None:
    original = "date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,101\n"
    ingest_file(store, settings, _write(tmp_path / "a.csv", original), today=TODAY)
    ingest_file(store, settings, _write(tmp_path / "fix.csv",
                                        "date,symbol,close\n2024-03-05,KLV,105\n"), today=TODAY)
    again = ingest_file(store, settings, _write(tmp_path / "a.csv", original), today=TODAY)
    assert not again.already_ingested
    assert (again.closes_restated, again.closes_unchanged) == (1, 1)
    assert read_closes(store).loc["2024-03-05", "KLV"] == 101.0
    # Unchanged content is still a no-op, whatever the file is called.
    same = ingest_file(store, settings, _write(tmp_path / "b.csv", original), today=TODAY)
    assert same.already_ingested and same.closes_unchanged == 2


def test_a_file_of_200000_bad_rows_stores_a_bounded_list(store: Store, settings: Settings,
                                                         tmp_path: Path) -> None:
    rows = 200_000
    body = "date,symbol,close\n" + "2024-03-04,KLV,x\n" * rows
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, _write(tmp_path / "big.csv", body), today=TODAY)
    assert len(info.value.problems) == rows
    with store.connect() as conn:
        kept = closes_store.list_batches(conn)[-1].problems.splitlines()
    assert len(kept) == STORED_PROBLEMS + 1
    assert kept[-1] == f"... and {rows - STORED_PROBLEMS} more problem(s) not shown"


def test_inbox_reads_upper_case_names_and_rejects_what_fails(
    store: Store, settings: Settings, monkeypatch: pytest.MonkeyPatch
) -> None:
    inbox = settings.inbox
    inbox.mkdir(parents=True, exist_ok=True)
    _write(inbox / "PRICES.CSV", "date,symbol,close\n2024-03-04,KLV,100\n")
    _write(inbox / "dup.csv", "date,Date,KLV\n2024-03-04,2024-03-04,1\n")
    collected = collect_inbox(store, settings, today=TODAY)
    assert [Path(r.file).name for r in collected.accepted] == ["PRICES.CSV"]
    assert (inbox / "processed" / "PRICES.CSV").exists()
    assert [p.name for p, _ in collected.rejected] == ["dup.csv"]
    problems = (inbox / "rejected" / "dup.csv.problems.txt").read_text(encoding="utf-8")
    assert problems.startswith("dup.csv:1: column 'Date' appears twice")

    # Whatever else goes wrong with one file, it leaves the inbox instead of blocking it.
    import monitor.pipeline.daily as daily

    def broken(*args: object, **kwargs: object) -> None:
        raise KeyError("surprise")

    monkeypatch.setattr(daily, "ingest_file", broken)
    _write(inbox / "odd.csv", "date,symbol,close\n2024-03-05,KLV,101\n")
    again = collect_inbox(store, settings, today=TODAY)
    assert [p.name for p, _ in again.rejected] == ["odd.csv"]
    assert not (inbox / "odd.csv").exists()
    text = (inbox / "rejected" / "odd.csv.problems.txt").read_text(encoding="utf-8")
    assert text.startswith("odd.csv: could not be ingested (unexpected KeyError")


GOOD = ("date,symbol,close,source\n2024-03-04,KLV,100,feed\n2024-03-05,KLV,101,feed\n"
        "2024-03-04,ORMA,50,\n\"2024-03-05\",ORMA,\"50.5\",x\n")
WIDE = "date,KLV,ORMA\n2024-03-04,100,50\n2024-03-05,,50.5\n"
NASTY = ['"', ",", "\n", "\r", "\r\n", ";", "\t", " ", "\x00", "\ufeff", "é", "1e-320",
         "nan", "inf", "-0", "1,5", "date", "Date", "symbol", "line", "\"\"", "KLV.1", "0x1p3"]


def test_no_file_content_reaches_an_unforeseen_error() -> None:
    """Random edits of good files (seeded): parse either succeeds or raises IngestError."""
    rng = random.Random(19)
    outcomes = {"ok": 0, "rejected": 0}
    for _ in range(800):
        text = list(rng.choice([GOOD, WIDE]))
        for _ in range(rng.randint(1, 4)):
            at = rng.randrange(len(text) + 1)
            if rng.random() < 0.5 and text:
                del text[min(at, len(text) - 1)]
            text[at:at] = rng.choice(NASTY)
        raw = "".join(text).encode("utf-8")
        try:
            parsed = parse_closes("f.csv", raw, today=TODAY, known_symbols=None,
                                  layout=rng.choice(["auto", "long", "wide"]))
        except IngestError as exc:
            outcomes["rejected"] += 1
            assert str(exc).startswith("f.csv"), str(exc)
            assert "\n" not in str(exc)
            continue
        outcomes["ok"] += 1
        assert all(p.startswith("f.csv:") and "\n" not in p for p in parsed.problems)
        closes = parsed.rows["close"].to_numpy()
        assert ((closes >= MIN_CLOSE) & (closes <= MAX_CLOSE)).all()
    assert outcomes["ok"] > 50 and outcomes["rejected"] > 50, outcomes


def test_ingest_dash_reads_standard_input(store: Store, settings: Settings,
                                          monkeypatch: pytest.MonkeyPatch,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    import io
    import types

    from monitor.cli import main

    body = b"date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,\n"
    monkeypatch.setattr("sys.stdin", types.SimpleNamespace(buffer=io.BytesIO(body)))
    assert main(["ingest", "-", "--config", str(settings.path)]) == 0
    out = capsys.readouterr()
    assert out.out.startswith("stdin: batch ")
    assert "no close: stdin:3: close is empty for KLV on 2024-03-05" in out.err
    assert read_closes(store).loc["2024-03-04", "KLV"] == 100.0


def test_many_bad_rows_print_the_first_problems_and_a_count(
    store: Store, settings: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from monitor.cli import PROBLEMS_SHOWN, main

    path = _write(tmp_path / "bad.csv", "date,symbol,close\n" + "2024-03-04,KLV,x\n" * 5000)
    assert main(["ingest", str(path), "--config", str(settings.path)]) == 1
    err = capsys.readouterr().err.splitlines()
    assert len(err) == PROBLEMS_SHOWN + 2
    assert err[PROBLEMS_SHOWN] == f"... and {5000 - PROBLEMS_SHOWN} more problem(s)"
    assert err[-1].startswith("Error: bad.csv: 5000 bad value(s) on 5000 line(s)")


def test_the_inbox_says_when_a_file_had_empty_closes(
    store: Store, settings: Settings, caplog: pytest.LogCaptureFixture
) -> None:
    import logging

    inbox = settings.inbox
    inbox.mkdir(parents=True, exist_ok=True)
    _write(inbox / "day.csv", "date,symbol,close\n2024-03-04,KLV,100\n2024-03-04,ORMA,\n")
    comove = logging.getLogger("comove")
    before = comove.propagate
    comove.propagate = True  # the command line's handler stops it; caplog listens at the root
    try:
        with caplog.at_level(logging.WARNING, logger="comove"):
            collected = collect_inbox(store, settings, today=TODAY)
    finally:
        comove.propagate = before
    assert [Path(r.file).name for r in collected.accepted] == ["day.csv"]
    assert any(r.getMessage() == "day.csv: 1 empty close(s) read as no close (first: "
               "day.csv:3: close is empty for ORMA on 2024-03-04; read as no close that day)"
               for r in caplog.records)
