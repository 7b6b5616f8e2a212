"""Ingest: every bad-row case is reported precisely and nothing is written; good files land
whole, restatements are audited, re-ingest is a no-op, and a crash leaves the store as it was."""

from __future__ import annotations

import datetime as dt
import gzip
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest

from monitor.config import Settings
from monitor.errors import IngestError
from monitor.pipeline import ingest_file, init_store, read_closes
from storage import Store
from storage import closes as closes_store

TODAY = dt.date(2024, 3, 8)


def _write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def _snapshot(store: Store) -> tuple[pd.DataFrame, pd.DataFrame, int]:
    with store.connect() as conn:
        long = closes_store.read_closes_long(conn)
        revisions = closes_store.list_revisions(conn)
    return long, revisions[["symbol", "date", "old_close", "new_close"]], len(revisions)


@pytest.fixture
def store(settings: Settings) -> Iterator[Store]:
    opened = init_store(settings)
    yield opened
    opened.dispose()


GOOD = "date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,101\n2024-03-04,ORMA,50\n"


def test_good_long_file_lands_whole(store: Store, settings: Settings, tmp_path: Path) -> None:
    report = ingest_file(store, settings, _write(tmp_path / "prices.csv", GOOD), today=TODAY)
    assert (report.closes_new, report.closes_restated, report.rows_rejected) == (3, 0, 0)
    panel = read_closes(store)
    assert panel.loc["2024-03-05", "KLV"] == 101.0
    assert panel.loc["2024-03-04", "ORMA"] == 50.0
    assert pd.isna(panel.loc["2024-03-05", "ORMA"])


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ("date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,abc\n",
         "prices.csv:3: close 'abc' for KLV on 2024-03-05 is not a number"),
        ("date,symbol,close\n2024-13-04,KLV,100\n",
         "prices.csv:2: date '2024-13-04' for KLV is not a date (expected YYYY-MM-DD)"),
        ("date,symbol,close\n2024-03-04,KLV,NaN\n",
         "prices.csv:2: close 'NaN' for KLV on 2024-03-04 is not a number (NaN)"),
        ("date,symbol,close\n2024-03-04,KLV,inf\n",
         "prices.csv:2: close 'inf' for KLV on 2024-03-04 is not finite"),
        ("date,symbol,close\n2024-03-04,KLV,0\n",
         "prices.csv:2: close '0' for KLV on 2024-03-04 must be positive"),
        ("date,symbol,close\n2024-03-04,KLV,-3.5\n",
         "prices.csv:2: close '-3.5' for KLV on 2024-03-04 must be positive"),
        ("date,symbol,close\n2024-03-04,KLV,100\n2024-03-04,KLV,101\n",
         "prices.csv:3: close '101' for KLV on 2024-03-04 conflicts with 100 on line 2"),
        ("date,symbol,close\n2024-03-09,KLV,100\n",
         "prices.csv:2: date '2024-03-09' for KLV is after today (2024-03-08 in Europe/Berlin)"),
        ("date,symbol,close\n2024-03-04,KLW,100\n",
         "prices.csv:2: symbol 'KLW' on 2024-03-04 is not a configured instrument; "
         "did you mean 'KLV'?"),
        ("date,ticker,close\n2024-03-04,KLV,100\n", "prices.csv:1: missing column 'symbol'"),
        ("when,KLV\n2024-03-04,100\n", "prices.csv:1: missing column 'date'"),
        ("", "prices.csv: file is empty"),
        ("date,symbol,close\n", "prices.csv: no data rows after the header"),
    ],
)
def test_bad_input_names_file_line_field_and_value_and_writes_nothing(
    store: Store, settings: Settings, tmp_path: Path, body: str, message: str
) -> None:
    before = _snapshot(store)
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, _write(tmp_path / "prices.csv", body), today=TODAY)
    reported = [str(info.value), *info.value.problems]
    assert any(line.startswith(message) for line in reported), reported
    after = _snapshot(store)
    pd.testing.assert_frame_equal(before[0], after[0])
    assert before[2] == after[2]


def test_missing_close_column_in_long_layout_is_named(store: Store, settings: Settings,
                                                      tmp_path: Path) -> None:
    path = _write(tmp_path / "prices.csv", "date,symbol,px\n2024-03-04,KLV,100\n")
    with pytest.raises(IngestError, match="missing column 'close'"):
        ingest_file(store, settings, path, layout="long", today=TODAY)


def test_bytes_that_are_not_utf8_are_located(store: Store, settings: Settings,
                                             tmp_path: Path) -> None:
    path = tmp_path / "prices.csv"
    path.write_bytes(b"date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,K\xffV,101\n")
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, path, today=TODAY)
    assert str(info.value) == "prices.csv:3: bytes are not UTF-8 (byte 0xff at column 13)"
    assert _snapshot(store)[0].empty


def test_every_bad_row_is_listed_not_only_the_first(store: Store, settings: Settings,
                                                    tmp_path: Path) -> None:
    body = ("date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,x\n"
            "2024-03-06,KLV,-1\n2024-03-07,ORMA,50\nbad,ORMA,51\n")
    with pytest.raises(IngestError) as info:
        ingest_file(store, settings, _write(tmp_path / "prices.csv", body), today=TODAY)
    lines = [p.split(":")[1] for p in info.value.problems]
    assert lines == ["3", "4", "6"]
    assert "3 bad value(s) on 3 line(s); nothing from the file was written" in str(info.value)
    assert _snapshot(store)[0].empty
    with store.connect() as conn:
        batch = closes_store.list_batches(conn)[-1]
    assert (batch.status, batch.rows_rejected, batch.rows_accepted) == ("rejected", 3, 0)


def test_skip_bad_writes_good_rows_and_records_rejects(store: Store, settings: Settings,
                                                       tmp_path: Path) -> None:
    body = "date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,x\n2024-03-04,ORMA,50\n"
    report = ingest_file(store, settings, _write(tmp_path / "prices.csv", body),
                         skip_bad=True, today=TODAY)
    assert (report.closes_new, report.rows_rejected) == (2, 1)
    with store.connect() as conn:
        batch = closes_store.list_batches(conn)[-1]
    assert batch.status == "partial"
    assert "prices.csv:3: close 'x' for KLV on 2024-03-05 is not a number" in batch.problems


def test_reingesting_the_same_data_is_a_no_op(store: Store, settings: Settings,
                                              tmp_path: Path) -> None:
    ingest_file(store, settings, _write(tmp_path / "a.csv", GOOD), today=TODAY)
    before = _snapshot(store)
    again = ingest_file(store, settings, _write(tmp_path / "a.csv", GOOD), today=TODAY)
    assert again.already_ingested
    # The same closes under another file name: diffed, nothing new, nothing restated.
    other = ingest_file(store, settings, _write(tmp_path / "b.csv", GOOD + "\n"), today=TODAY)
    assert (other.closes_new, other.closes_restated, other.closes_unchanged) == (0, 0, 3)
    after = _snapshot(store)
    pd.testing.assert_frame_equal(before[0], after[0])
    assert after[2] == 0


def test_restatement_is_applied_audited_and_reported(store: Store, settings: Settings,
                                                     tmp_path: Path) -> None:
    ingest_file(store, settings, _write(tmp_path / "a.csv", GOOD), today=TODAY)
    fix = "date,symbol,close\n2024-03-04,KLV,100.25\n2024-03-05,KLV,101\n"
    report = ingest_file(store, settings, _write(tmp_path / "fix.csv", fix), today=TODAY)
    assert (report.closes_restated, report.closes_unchanged) == (1, 1)
    assert report.earliest_restated == dt.date(2024, 3, 4)
    _, revisions, count = _snapshot(store)
    assert count == 1
    row = revisions.iloc[0]
    assert (row.symbol, row.old_close, row.new_close) == ("KLV", 100.0, 100.25)
    assert read_closes(store).loc["2024-03-04", "KLV"] == 100.25


def test_wide_layout_and_gzip_are_read(store: Store, settings: Settings, tmp_path: Path) -> None:
    wide = "date,KLV,ORMA\n2024-03-04,100,50\n2024-03-05,101,\n"
    path = tmp_path / "wide.csv.gz"
    path.write_bytes(gzip.compress(wide.encode()))
    report = ingest_file(store, settings, path, today=TODAY)
    assert report.closes_new == 3
    panel = read_closes(store)
    assert pd.isna(panel.loc["2024-03-05", "ORMA"])


def test_format_override_reads_a_long_looking_file_as_wide(
    store: Store, settings: Settings, tmp_path: Path
) -> None:
    path = _write(tmp_path / "w.csv", "date,KLV,ORMA\n2024-03-04,100,50\n")
    with pytest.raises(IngestError, match="missing column 'symbol'"):
        ingest_file(store, settings, path, layout="long", today=TODAY)
    assert ingest_file(store, settings, path, layout="wide", today=TODAY).closes_new == 2


def test_large_daily_move_is_accepted_but_reported_as_suspect(
    store: Store, settings: Settings, tmp_path: Path
) -> None:
    body = "date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,140\n2024-03-06,KLV,101\n"
    report = ingest_file(store, settings, _write(tmp_path / "p.csv", body), today=TODAY)
    assert report.closes_new == 3
    flagged = report.suspects[["symbol", "close"]].itertuples(index=False)
    assert [tuple(r) for r in flagged] == [("KLV", 140.0), ("KLV", 101.0)]
    with store.connect() as conn:
        assert len(closes_store.list_suspects(conn)) == 2


def test_crash_half_way_through_the_write_leaves_store_exactly_as_before(
    store: Store, settings: Settings, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ingest_file(store, settings, _write(tmp_path / "a.csv", GOOD), today=TODAY)
    before = _snapshot(store)
    with store.connect() as conn:
        batches_before = len(closes_store.list_batches(conn))

    def explode(*args: object, **kwargs: object) -> None:
        raise RuntimeError("disk on fire")

    # New closes and the restatement's UPDATE have run by the time revisions are written.
    monkeypatch.setattr(closes_store, "write_revisions", explode)
    body = "date,symbol,close\n2024-03-04,KLV,99\n2024-03-06,KLV,102\n2024-03-06,ORMA,51\n"
    with pytest.raises(RuntimeError, match="disk on fire"):
        ingest_file(store, settings, _write(tmp_path / "b.csv", body), today=TODAY)
    after = _snapshot(store)
    pd.testing.assert_frame_equal(before[0], after[0])
    assert after[2] == before[2]
    with store.connect() as conn:
        assert len(closes_store.list_batches(conn)) == batches_before


def test_unknown_symbols_accepted_when_allowed(store_url: str, write_settings: object,
                                               tmp_path: Path) -> None:
    from tests.conftest import DESK_TOML

    settings = write_settings(  # type: ignore[operator]
        store_url, DESK_TOML + "\n[sources]\nallow_new_symbols = true\n")
    store = init_store(settings)
    body = "date,symbol,close\n2024-03-04,NEWX,10\n"
    assert ingest_file(store, settings, _write(tmp_path / "n.csv", body),
                       today=TODAY).closes_new == 1
    store.dispose()
