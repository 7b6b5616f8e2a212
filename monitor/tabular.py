"""Tables for other tools: CSV and JSON of one frame, with the same field names and values.

Dates print as ``YYYY-MM-DD`` (a time of day only where there is one); numbers keep their
full precision (JSON floats are written with Python's shortest round-trip repr, so
``float(text)`` gives back the same double); a missing value is an empty CSV field and a
JSON ``null``, never ``NaN`` (which is not JSON).
"""

from __future__ import annotations

import datetime as dt
import json
import math
from typing import Any

import numpy as np
import pandas as pd


def plain_dates(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with dates as YYYY-MM-DD text (a time of day only where there is
    one); missing dates become None."""
    out = frame.copy()
    for col in out.columns:
        values = out[col]
        if pd.api.types.is_datetime64_any_dtype(values):
            midnight = values.dropna().eq(values.dropna().dt.normalize()).all()
            text = values.dt.strftime("%Y-%m-%d") if midnight else values.map(
                lambda v: None if pd.isna(v) else v.isoformat())
            out[col] = text.astype(object).where(values.notna(), None)
        elif values.dtype == object:
            out[col] = values.map(_date_text)
    return out


def _date_text(value: Any) -> Any:
    if isinstance(value, dt.datetime):
        return value.date().isoformat() if value == dt.datetime.combine(
            value.date(), dt.time(), value.tzinfo) else value.isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    return value


def _plain(value: Any) -> Any:
    """One cell as a JSON value: None for missing, Python int/float/bool/str otherwise."""
    if value is None or value is pd.NaT or value is pd.NA:
        return None
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        number = float(value)
        return None if math.isnan(number) or math.isinf(number) else number
    if isinstance(value, dt.date):
        return _date_text(value)
    return value


def to_csv(frame: pd.DataFrame) -> str:
    """CSV text: a header of the frame's column names, full-precision numbers
    (pandas writes floats with repr), empty fields for missing values."""
    return plain_dates(frame).to_csv(index=False)


def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """The frame as a list of ``{column: value}`` with plain Python values."""
    plain = plain_dates(frame)
    columns = [str(c) for c in plain.columns]
    return [dict(zip(columns, (_plain(v) for v in row), strict=True))
            for row in plain.itertuples(index=False, name=None)]


def to_json(frame: pd.DataFrame) -> str:
    """JSON text: an array of records with the CSV's field names (see the module doc)."""
    return json.dumps(records(frame), indent=1, ensure_ascii=False, allow_nan=False)
