"""Reading closes files (CSV, CSV.GZ) and validating every row before anything is written.

A file is parsed completely and every bad row is reported, not only the first; the store
is touched only by `monitor.pipeline`, in one transaction, after this module has spoken.
Messages follow one shape so a user can jump to the line:
`prices.csv:123: close 'abc' for XYZ on 2024-03-05 is not a number`.
"""

from __future__ import annotations

import datetime as dt
import difflib
import gzip
import hashlib
import io
import zlib
from collections.abc import Collection
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd

from monitor.errors import IngestError

FileFormat = Literal["auto", "long", "wide"]
LONG_COLUMNS = ("date", "symbol", "close")
DATE_FORMAT = "%Y-%m-%d"


@dataclass
class ParsedFile:
    """A closes file after validation.

    `rows` has columns symbol (str), date (datetime64), close (float64), source (str) and
    line (int, 1-based line in the file) for every accepted value; `problems` has one line
    per rejected value or row.
    """

    name: str
    sha256: str
    layout: Literal["long", "wide"]
    rows_read: int
    rows: pd.DataFrame
    problems: list[str] = field(default_factory=list)
    rows_rejected: int = 0
    """Lines of the file with at least one problem."""


def read_bytes(path: Path) -> bytes:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise IngestError(f"{path}: no such file") from None
    except OSError as exc:
        raise IngestError(f"{path}: cannot read ({exc.strerror})") from None
    if path.name.endswith(".gz"):
        try:
            raw = gzip.decompress(raw)
        except (OSError, EOFError, zlib.error) as exc:
            raise IngestError(f"{path.name}: not a readable gzip file ({exc})") from None
    return raw


def _decode(name: str, raw: bytes) -> str:
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        column = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        bad = raw[exc.start : exc.start + 1].hex()
        raise IngestError(
            f"{name}:{line}: bytes are not UTF-8 (byte 0x{bad} at column {column})"
        ) from None


def _detect_layout(name: str, columns: list[str], wanted: FileFormat) -> Literal["long", "wide"]:
    lowered = [c.strip().lower() for c in columns]
    # A 'symbol' or 'close' column means the long layout was meant, so a missing partner
    # column is reported instead of reading the file as wide.
    if wanted == "long" or (wanted == "auto" and ("symbol" in lowered or "close" in lowered)):
        missing = [c for c in LONG_COLUMNS if c not in lowered]
        if missing:
            raise IngestError(
                f"{name}:1: missing column '{missing[0]}' for the long layout "
                f"(expected date, symbol, close[, source]; found: {', '.join(columns)})"
            )
        return "long"
    if "date" not in lowered:
        raise IngestError(
            f"{name}:1: missing column 'date' (expected date, symbol, close[, source] or "
            f"date plus one column per symbol; found: {', '.join(columns)})"
        )
    if len(columns) < 2:
        raise IngestError(f"{name}:1: only a date column; no symbol columns in the wide layout")
    return "wide"


def parse_closes(
    name: str,
    raw: bytes,
    *,
    today: dt.date,
    known_symbols: Collection[str] | None,
    layout: FileFormat = "auto",
    today_zone: str = "",
) -> ParsedFile:
    """Validate a closes file given as bytes.

    Parameters
    ----------
    name : file name used in messages.
    raw : the file's bytes (already decompressed).
    today : the desk's current date; closes dated after it are refused.
    known_symbols : symbols accepted; None accepts every symbol.
    layout : "long" (date, symbol, close[, source]), "wide" (date plus a column per
        symbol) or "auto" (long when those three columns are present).
    """
    sha = hashlib.sha256(raw).hexdigest()
    if not raw.strip():
        raise IngestError(f"{name}: file is empty")
    text = _decode(name, raw)
    try:
        frame = pd.read_csv(
            io.StringIO(text), dtype=str, keep_default_na=False, skip_blank_lines=False
        )
    except pd.errors.ParserError as exc:
        raise IngestError(f"{name}: not a readable CSV file ({str(exc).strip()})") from None
    except pd.errors.EmptyDataError:
        raise IngestError(f"{name}: file is empty") from None
    columns = [str(c) for c in frame.columns]
    chosen = _detect_layout(name, columns, layout)
    frame.columns = pd.Index([c.strip() for c in columns])
    # Most feeds write no blanks at all: then no field needs stripping, which spares
    # several passes over a ten-year file.
    padded = " " in text or "\t" in text
    frame["line"] = np.arange(len(frame), dtype=np.int64) + 2
    # Blank lines are kept by read_csv above so line numbers stay exact; drop them now.
    cells = frame.drop(columns="line").fillna("")
    if padded:
        cells = cells.apply(lambda col: col.str.strip())
    blank = (cells == "").all(axis=1)
    frame = frame.loc[~blank.to_numpy()]
    if frame.empty:
        raise IngestError(f"{name}: no data rows after the header")
    if chosen == "long":
        rename = {c: c.lower() for c in frame.columns if c.lower() in (*LONG_COLUMNS, "source")}
        long = frame.rename(columns=rename)
        if "source" not in long.columns:
            long["source"] = ""
        long = long[["date", "symbol", "close", "source", "line"]].copy()
        rows_read = len(long)
    else:
        date_col = next(c for c in frame.columns if c.lower() == "date")
        symbol_cols = [c for c in frame.columns if c not in (date_col, "line")]
        long = frame.melt(
            id_vars=[date_col, "line"], value_vars=symbol_cols, var_name="symbol",
            value_name="close",
        ).rename(columns={date_col: "date"})
        long["close"] = long["close"].fillna("")
        # An empty cell in the wide layout means "no close that day", not an error.
        empty = long["close"].str.strip() == "" if padded else long["close"] == ""
        long = long.loc[~empty].copy()
        long["source"] = ""
        long = long.sort_values(["line", "symbol"], kind="stable")
        rows_read = len(frame)
    return _validate(name, sha, chosen, rows_read, long, today, known_symbols, today_zone,
                     padded)


def _validate(
    name: str,
    sha: str,
    chosen: Literal["long", "wide"],
    rows_read: int,
    long: pd.DataFrame,
    today: dt.date,
    known_symbols: Collection[str] | None,
    today_zone: str,
    padded: bool = True,
) -> ParsedFile:
    long = long.reset_index(drop=True)
    for col in ("date", "symbol", "close", "source"):
        long[col] = long[col].fillna("").astype(str)
        if padded:
            long[col] = long[col].str.strip()
    dates = pd.to_datetime(long["date"], format=DATE_FORMAT, errors="coerce")
    closes = pd.to_numeric(long["close"], errors="coerce").astype("float64")
    bad: dict[int, str] = {}

    def report(mask: pd.Series | np.ndarray, make: object) -> None:
        idx = np.flatnonzero(np.asarray(mask) & ~long.index.isin(list(bad)))
        for i in idx:
            bad[int(i)] = make(i)  # type: ignore[operator]

    line = long["line"].to_numpy()
    sym = long["symbol"].to_numpy()
    raw_date = long["date"].to_numpy()
    raw_close = long["close"].to_numpy()

    def where(i: int) -> str:
        return f"for {sym[i]} on {raw_date[i]}"

    report(long["symbol"] == "", lambda i: f"{name}:{line[i]}: symbol is empty")
    report(
        dates.isna(),
        lambda i: f"{name}:{line[i]}: date '{raw_date[i]}' for {sym[i]} is not a date "
        "(expected YYYY-MM-DD)",
    )
    unparsed = closes.isna()
    spelled_nan = long["close"].where(unparsed, "").str.lower().isin(["nan", "-nan", "+nan"])
    report(
        unparsed & spelled_nan,
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is not a number (NaN)",
    )
    report(
        closes.isna(),
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is not a number",
    )
    report(
        np.isinf(closes.to_numpy()),
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is not finite",
    )
    report(
        closes.to_numpy() <= 0,
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} must be positive",
    )
    zone = f" in {today_zone}" if today_zone else ""
    report(
        (dates > pd.Timestamp(today)).to_numpy(),
        lambda i: f"{name}:{line[i]}: date '{raw_date[i]}' for {sym[i]} is after today "
        f"({today.isoformat()}{zone})",
    )
    if known_symbols is not None:
        known = set(known_symbols)
        choices = sorted(known)

        def unknown(i: int) -> str:
            near = difflib.get_close_matches(str(sym[i]), choices, n=1, cutoff=0.6)
            hint = f"; did you mean '{near[0]}'?" if near else ""
            return (
                f"{name}:{line[i]}: symbol '{sym[i]}' on {raw_date[i]} is not a configured "
                f"instrument{hint}"
            )

        report(~long["symbol"].isin(known) & (long["symbol"] != ""), unknown)

    good = long.assign(date=dates, close=closes)
    good = good.loc[~good.index.isin(list(bad))]
    # The same (date, symbol) twice: harmless when the value agrees, a conflict otherwise.
    keys = good.groupby(["symbol", "date"], sort=False)
    first_close = keys["close"].transform("first").to_numpy()
    first_line = keys["line"].transform("first").to_numpy()
    conflict_key = keys["close"].transform("nunique").to_numpy() > 1
    differs = good["close"].to_numpy() != first_close
    for pos in np.flatnonzero(differs):
        i = int(good.index[pos])
        bad[i] = (
            f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} conflicts with "
            f"{first_close[pos]:g} on line {first_line[pos]}"
        )
    good = good.loc[~conflict_key].drop_duplicates(["symbol", "date"], keep="first")
    problems = [bad[i] for i in sorted(bad, key=lambda i: (line[i], sym[i]))]
    rows = good[["symbol", "date", "close", "source", "line"]].reset_index(drop=True)
    return ParsedFile(name=name, sha256=sha, layout=chosen, rows_read=rows_read, rows=rows,
                      problems=problems, rows_rejected=len({int(line[i]) for i in bad}))
