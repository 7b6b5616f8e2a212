"""A small fictional desk with one planted hedge break, shared by the pipeline tests."""

from __future__ import annotations

import datetime as dt

from monitor.demo.model import Episode, InstrumentSpec, Scenario

START, END = dt.date(2022, 1, 3), dt.date(2023, 12, 29)
BREAK_START, BREAK_END = dt.date(2023, 3, 1), dt.date(2023, 5, 31)

RULES = """
[[rules]]
name = "hedge-break"
kind = "level"
measure = "rolling:21"
pairs = ["KLV/DUNQ"]
below = 0.3
clear = 0.45
hold = 3
severity = "critical"
remind_every = 5

[[rules]]
name = "hedge-jump"
kind = "jump"
measure = "rolling:21"
pairs = ["KLV/DUNQ"]
delta = 0.4
over_days = 10
"""

INSTRUMENTS = """
[desk]
name = "Halden Test Desk"
timezone = "Europe/Berlin"

[[instruments]]
symbol = "KLV"
name = "Kelvara Industrial"
group = "equities"

[[instruments]]
symbol = "DUNQ"
name = "Dunquist Machines"
group = "equities"

[[instruments]]
symbol = "TEZ10"
name = "Tezran 10-year bond future"
group = "rates"
"""


def break_scenario() -> Scenario:
    """KLV and DUNQ move together (about 0.8) except from BREAK_START to BREAK_END."""
    return Scenario(
        instruments=(
            InstrumentSpec("KLV", "Kelvara Industrial", "equities", loadings={"market": 0.9}),
            InstrumentSpec("DUNQ", "Dunquist Machines", "equities", loadings={"market": 0.9}),
            InstrumentSpec("TEZ10", "Tezran 10-year bond future", "rates",
                           loadings={"market": -0.3}, vol=0.004),
        ),
        factors=("market",),
        start=START, end=END, seed=5, missing_rate=0.0, garch=None,
        episodes=(Episode("decouple", BREAK_START, BREAK_END, symbols=("KLV", "DUNQ"),
                          description="the hedge stops working for three months"),),
    )




def digest_section(port: int) -> str:
    """A [digest] section sending to a test mail server on `port`, one attempt, no wait."""
    return (f'\n[digest]\nrecipients = ["risk@halden.example"]\nsender = "comove@halden.example"'
            f'\nsmtp_host = "127.0.0.1"\nsmtp_port = {port}\nsecurity = "none"\nattempts = 1'
            '\nbackoff_seconds = 0.01\n')


SPIKE_RULE = """
[[rules]]
name = "spike-level"
kind = "level"
measure = "rolling:21"
pairs = ["KLV/TEZ10"]
above = 0.6
hold = 1
severity = "warning"
"""
"""A level rule on KLV/TEZ10 that a bad tick in both on the same day sets off."""

WEEKDAY_SCHEDULE = """
[schedule]
days = ["mon", "tue", "wed", "thu", "fri"]
time = "18:30"
"""
