"""Reading closes files (CSV, CSV.GZ) and validating every row before anything is written.

A file is parsed completely and every bad row is reported, not only the first; the store
is touched only by `monitor.pipeline`, in one transaction, after this module has spoken.
Messages follow one shape so a user can jump to the line:
`prices.csv:123: close 'abc' for XYZ on 2024-03-05 is not a number`.
"""

from __future__ import annotations

import csv
import datetime as dt
import difflib
import gzip
import hashlib
import io
import re
import zlib
from collections.abc import Collection
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd

from monitor.errors import IngestError
from monitor.symbols import SYMBOL_PATTERN, SYMBOL_RULE

FileFormat = Literal["auto", "long", "wide"]
LONG_COLUMNS = ("date", "symbol", "close")
DATE_FORMAT = "%Y-%m-%d"

MIN_CLOSE = 1e-12
MAX_CLOSE = 1e15
"""Closes outside [MIN_CLOSE, MAX_CLOSE] are refused: beyond them a value is a bad tick or a
unit error, not a price, and the ratio of two accepted closes (at most 1e27) keeps every
return finite in float64, for log and simple returns alike."""

SOURCE_MAX_LENGTH = 200
"""The longest `source` value the store keeps (its column's width)."""

_LINE = " line"
"""The internal line-number column: no header can be named so (headers are stripped), so a
wide column called `line` stays a symbol."""

_FIELD_COUNT = re.compile(r"Expected (\d+) fields in line (\d+), saw (\d+)")
_OPEN_QUOTE = re.compile(r"EOF inside string starting at row (\d+)")
_DECIMAL_COMMA = re.compile(r"\d,\d{1,8}\s*$")


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
    notes: list[str] = field(default_factory=list)
    """Lines read as no close (an empty close in the long layout): reported, not errors."""
    bad_lines: list[int] = field(default_factory=list)
    """The line numbers with at least one problem, ascending."""


def read_bytes(path: Path) -> bytes:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise IngestError(f"{path}: no such file") from None
    except OSError as exc:
        raise IngestError(f"{path}: cannot read ({exc.strerror})") from None
    return decompressed(path.name, raw)


def decompressed(name: str, raw: bytes) -> bytes:
    """The bytes of a closes file, gunzipped when the name or the content says gzip."""
    if name.lower().endswith(".gz") or raw[:2] == b"\x1f\x8b":
        try:
            return gzip.decompress(raw)
        except (OSError, EOFError, zlib.error) as exc:
            raise IngestError(f"{name}: not a readable gzip file ({exc})") from None
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


def _check_header(name: str, header: list[str]) -> None:
    """Every column named, and named once (`date` and `Date` are the same column)."""
    seen: dict[str, int] = {}
    for number, raw in enumerate(header, start=1):
        column = raw.strip()
        if not column:
            raise IngestError(
                f"{name}:1: column {number} has no name; every column needs a header "
                "(a trailing comma adds an empty column)"
            )
        key = column.lower() if column.lower() in (*LONG_COLUMNS, "source") else column
        if key in seen:
            raise IngestError(
                f"{name}:1: column '{_show(column)}' appears twice in the header (columns "
                f"{seen[key]} and {number}); name each column once"
            )
        seen[key] = number


def _detect_layout(name: str, columns: list[str], wanted: FileFormat) -> Literal["long", "wide"]:
    lowered = [c.strip().lower() for c in columns]
    if wanted == "wide" and "symbol" in lowered and "close" in lowered:
        raise IngestError(
            f"{name}:1: the header ({_listed(columns)}) is the long layout "
            "(date, symbol, close); --format wide expects date plus one column per symbol: "
            "use --format long or auto"
        )
    # A 'symbol' or 'close' column means the long layout was meant, so a missing partner
    # column is reported instead of reading the file as wide.
    if wanted == "long" or (wanted == "auto" and ("symbol" in lowered or "close" in lowered)):
        missing = [c for c in LONG_COLUMNS if c not in lowered]
        if missing:
            raise IngestError(
                f"{name}:1: missing column '{missing[0]}' for the long layout "
                f"(expected date, symbol, close[, source]; found: {_listed(columns)})"
            )
        return "long"
    if "date" not in lowered:
        raise IngestError(
            f"{name}:1: missing column 'date' (expected date, symbol, close[, source] or "
            f"date plus one column per symbol; found: {_listed(columns)})"
        )
    if len(columns) < 2:
        raise IngestError(f"{name}:1: only a date column; no symbol columns in the wide layout")
    for column in columns:
        column = column.strip()
        if column.lower() in ("symbol", "close", "source"):
            raise IngestError(
                f"{name}:1: column '{column}' belongs to the long layout (date, symbol, "
                "close[, source]); the wide layout is date plus one column per symbol"
            )
        if column.lower() != "date" and not SYMBOL_PATTERN.match(column):
            raise IngestError(
                f"{name}:1: column '{_show(column)}' is not a valid symbol for the wide layout "
                f"({SYMBOL_RULE})"
            )
    return "wide"


def _not_csv(name: str, text: str, exc: Exception) -> IngestError:
    """A tokenising error, located, with a hint for the usual cause (a decimal comma)."""
    reason = str(exc).strip()
    quote = _OPEN_QUOTE.search(reason)
    if quote is not None:
        # pandas counts rows from 0 at the header, so row N is line N + 1.
        return IngestError(f"{name}:{int(quote.group(1)) + 1}: a quote (\") opens a field "
                           "that is never closed")
    found = _FIELD_COUNT.search(reason)
    if found is None:
        return IngestError(f"{name}: not a readable CSV file ({reason})")
    expected, line, saw = (int(g) for g in found.groups())
    lines = text.splitlines()
    content = lines[line - 1] if 0 < line <= len(lines) else ""
    hint = ""
    if _DECIMAL_COMMA.search(content):
        hint = ("; a decimal comma? write closes with a decimal point (101.5) or quote "
                "the value")
    return IngestError(
        f"{name}:{line}: {saw} fields where the header has {expected}{hint}"
    )


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
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise IngestError(f"{name}:{line}: a NUL byte; this is not a text CSV file")
    try:
        header = next(csv.reader(io.StringIO(text)), [])
    except csv.Error as exc:
        raise IngestError(f"{name}:1: header is not readable CSV ({exc})") from None
    _check_header(name, header)
    try:
        frame = pd.read_csv(
            io.StringIO(text), dtype=str, keep_default_na=False, skip_blank_lines=False
        )
    except pd.errors.ParserError as exc:
        raise _not_csv(name, text, exc) from None
    except pd.errors.EmptyDataError:
        raise IngestError(f"{name}: file is empty") from None
    columns = [str(c) for c in frame.columns]
    if len(columns) != len(header):
        raise IngestError(f"{name}:1: header is not readable CSV (found: {', '.join(header)})")
    # pandas renames a repeated name ('KLV.1'); the header as written is what counts.
    columns = [c.strip() for c in header]
    chosen = _detect_layout(name, columns, layout)
    frame.columns = pd.Index(columns)
    # Most feeds write no blanks at all: then no field needs stripping, which spares
    # several passes over a ten-year file.
    padded = " " in text or "\t" in text
    frame[_LINE] = np.arange(len(frame), dtype=np.int64) + 2
    # Blank lines are kept by read_csv above so line numbers stay exact; drop them now.
    cells = frame.drop(columns=_LINE).fillna("")
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
        long = long[["date", "symbol", "close", "source", _LINE]].copy()
        rows_read = len(long)
    else:
        date_col = next(c for c in frame.columns if c.lower() == "date")
        symbol_cols = [c for c in frame.columns if c not in (date_col, _LINE)]
        long = frame.melt(
            id_vars=[date_col, _LINE], value_vars=symbol_cols, var_name="symbol",
            value_name="close",
        ).rename(columns={date_col: "date"})
        long["close"] = long["close"].fillna("")
        # An empty cell in the wide layout means "no close that day", not an error.
        empty = long["close"].str.strip() == "" if padded else long["close"] == ""
        long = long.loc[~empty].copy()
        long["source"] = ""
        long = long.sort_values([_LINE, "symbol"], kind="stable")
        rows_read = len(frame)
    long = long.rename(columns={_LINE: "line"})
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
    notes: dict[int, str] = {}

    def report(mask: pd.Series | np.ndarray, make: object, into: dict[int, str] = bad) -> None:
        idx = np.flatnonzero(np.asarray(mask) & ~long.index.isin([*bad, *notes]))
        for i in idx:
            into[int(i)] = make(i)  # type: ignore[operator]

    line = long["line"].to_numpy()
    sym = long["symbol"].to_numpy()
    raw_date = long["date"].to_numpy()
    raw_close = long["close"].to_numpy()

    def where(i: int) -> str:
        return f"for {sym[i]} on {_show(raw_date[i])}"

    report(long["symbol"] == "", lambda i: f"{name}:{line[i]}: symbol is empty")
    report(
        ~long["symbol"].str.match(SYMBOL_PATTERN),
        lambda i: f"{name}:{line[i]}: symbol '{_show(sym[i])}' is not a valid symbol "
        f"({SYMBOL_RULE})",
    )
    if known_symbols is not None:
        known = set(known_symbols)
        choices = sorted(known)

        def unknown(i: int) -> str:
            near = difflib.get_close_matches(str(sym[i]), choices, n=1, cutoff=0.6)
            hint = f"; did you mean '{near[0]}'?" if near else ""
            return (
                f"{name}:{line[i]}: symbol '{sym[i]}' on {_show(raw_date[i])} is not a "
                f"configured instrument{hint}"
            )

        report(~long["symbol"].isin(known), unknown)
    report(
        long["source"].str.len() > SOURCE_MAX_LENGTH,
        lambda i: f"{name}:{line[i]}: source '{_show(long['source'].iat[i])}' {where(i)} is "
        f"longer than {SOURCE_MAX_LENGTH} characters",
    )
    report(
        dates.isna(),
        lambda i: f"{name}:{line[i]}: date '{_show(raw_date[i])}' for {sym[i]} is not a date "
        "(expected YYYY-MM-DD)",
    )
    zone = f" in {today_zone}" if today_zone else ""
    report(
        (dates > pd.Timestamp(today)).to_numpy(),
        lambda i: f"{name}:{line[i]}: date '{raw_date[i]}' for {sym[i]} is after today "
        f"({today.isoformat()}{zone})",
    )
    # An empty close means "no close that day", as an empty cell does in the wide layout:
    # the line is not an error, but it is reported so a gap in the feed is seen.
    report(
        long["close"] == "",
        lambda i: f"{name}:{line[i]}: close is empty {where(i)}; read as no close that day",
        into=notes,
    )
    unparsed = closes.isna()
    spelled_nan = long["close"].where(unparsed, "").str.lower().isin(["nan", "-nan", "+nan"])
    report(
        unparsed & spelled_nan,
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is not a number (NaN)",
    )
    comma = long["close"].where(unparsed, "").str.fullmatch(r"[+-]?\d+,\d+")
    report(
        unparsed & comma,
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is not a number "
        "(a decimal comma? write it with a decimal point)",
    )
    report(
        closes.isna(),
        lambda i: f"{name}:{line[i]}: close '{_show(raw_close[i])}' {where(i)} is not a number",
    )
    report(
        np.isinf(closes.to_numpy()),
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is not finite",
    )
    report(
        closes.to_numpy() <= 0,
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} must be positive",
    )
    report(
        (closes.to_numpy() < MIN_CLOSE) | (closes.to_numpy() > MAX_CLOSE),
        lambda i: f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} is outside the "
        f"accepted range {MIN_CLOSE:g} to {MAX_CLOSE:g} (a bad tick or a unit error?)",
    )

    good = long.assign(date=dates, close=closes)
    good = good.loc[~good.index.isin([*bad, *notes])]
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
    # The first line of a conflicting pair is dropped too (which one is right is not
    # known), so it is reported as well, naming the first line that contradicts it.
    firsts = good.loc[conflict_key & ~differs]
    contradicted = good.loc[differs].drop_duplicates(["symbol", "date"], keep="first")
    other = firsts[["symbol", "date"]].merge(
        contradicted[["symbol", "date", "close", "line"]], on=["symbol", "date"], how="left")
    for i, value, at in zip(firsts.index, other["close"], other["line"], strict=True):
        if int(i) not in bad:
            bad[int(i)] = (
                f"{name}:{line[i]}: close '{raw_close[i]}' {where(i)} conflicts with "
                f"{value:g} on line {int(at)}; both lines are left out"
            )
    good = good.loc[~conflict_key].drop_duplicates(["symbol", "date"], keep="first")
    problems = [bad[i] for i in sorted(bad, key=lambda i: (line[i], sym[i]))]
    rows = good[["symbol", "date", "close", "source", "line"]].reset_index(drop=True)
    return ParsedFile(name=name, sha256=sha, layout=chosen, rows_read=rows_read, rows=rows,
                      problems=problems, rows_rejected=len({int(line[i]) for i in bad}),
                      bad_lines=sorted({int(line[i]) for i in bad}),
                      notes=[notes[i] for i in sorted(notes, key=lambda i: line[i])])


def _listed(columns: list[str], most: int = 12) -> str:
    shown = ", ".join(_show(c) for c in columns[:most])
    return shown + (f", ... ({len(columns)} columns)" if len(columns) > most else "")


def _show(value: object, limit: int = 40) -> str:
    """A field as it may appear in a one-line message: control characters escaped, cut."""
    text = str(value)
    if text.isprintable() and len(text) <= limit:
        return text
    shown = text.encode("unicode_escape").decode("ascii")
    return shown if len(shown) <= limit else shown[: limit - 3] + "..."
