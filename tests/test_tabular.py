"""monitor.tabular: CSV and JSON with the same field names, dates as YYYY-MM-DD, every
digit of a float kept (reference: Python's float repr round trip), null for missing."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json

import numpy as np
import pandas as pd

from monitor import tabular


def _frame() -> pd.DataFrame:
    return pd.DataFrame({
        "date": pd.to_datetime(["2018-11-02", "2018-11-05", "2018-11-06"]),
        "opened": [dt.date(2018, 11, 2), None, dt.date(2018, 11, 6)],
        "value": [0.1 + 0.2, 1.0 / 3.0, np.nan],
        "n": [63, 62, 61],
        "stale": [False, True, False],
        "target": ["KLV/ORMA", "KLV/ORMA", ""],
    })


def test_json_keeps_every_digit_dates_and_nulls() -> None:
    rows = json.loads(tabular.to_json(_frame()))
    assert rows[0]["value"] == 0.1 + 0.2  # 0.30000000000000004, not 0.3
    assert rows[1]["value"] == 1.0 / 3.0
    assert rows[2]["value"] is None  # NaN is not JSON
    assert [r["date"] for r in rows] == ["2018-11-02", "2018-11-05", "2018-11-06"]
    assert rows[1]["opened"] is None and rows[0]["opened"] == "2018-11-02"
    assert rows[0]["n"] == 63 and isinstance(rows[0]["n"], int)
    assert rows[1]["stale"] is True


def test_csv_and_json_have_the_same_field_names_and_values() -> None:
    frame = _frame()
    table = list(csv.DictReader(io.StringIO(tabular.to_csv(frame))))
    rows = json.loads(tabular.to_json(frame))
    assert list(table[0]) == list(rows[0]) == list(frame.columns)
    for line, row in zip(table, rows, strict=True):
        assert line["date"] == row["date"]
        if row["value"] is None:
            assert line["value"] == ""
        else:
            assert float(line["value"]) == row["value"]


def test_pandas_default_json_would_round() -> None:
    # The reason for this module: DataFrame.to_json keeps 10 significant digits and writes
    # dates as 2018-11-02T00:00:00.000.
    text = _frame().to_json(orient="records", date_format="iso")
    assert json.loads(text)[0]["value"] != 0.1 + 0.2
    assert "2018-11-02T00:00:00.000" in text
