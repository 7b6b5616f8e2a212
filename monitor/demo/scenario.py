"""The demo desk: a fictional multi-asset book on a fictional calendar.

Every name, code and currency is invented. Home currency: the Kordan ral (KRD). Foreign:
Valmer mark (VLM), Osnet crown (OSN), Tezar peso (TZP), Pavolen lira (PVL), Zelm franc
(ZLF). The generator itself is in :mod:`monitor.demo.synthetic`.
"""

from __future__ import annotations

from datetime import date

from monitor.demo.model import Episode, InstrumentSpec, Scenario, trading_days
from monitor.errors import ConfigError

DEMO_FACTORS: tuple[str, ...] = ("market", "industrials", "rates", "energy", "currency", "credit")

_DEMO_INSTRUMENTS: tuple[tuple[str, str, str, str, float, float, dict[str, float]], ...] = (
    # symbol, name, group, currency, start price, daily vol, loadings
    ("KLV", "Kelvara Industrial", "equities", "KRD", 48.0, 0.014,
     {"market": 0.55, "industrials": 0.70}),
    ("DUNQ", "Dunquist Shipping", "equities", "KRD", 31.5, 0.016,
     {"market": 0.50, "industrials": 0.70}),
    ("ORMA", "Orma Utilities", "equities", "KRD", 22.0, 0.009, {"market": 0.45, "rates": 0.25}),
    ("VSKR", "Veskar Semiconductors", "equities", "KRD", 140.0, 0.022, {"market": 0.75}),
    ("TRQL", "Tranquel Pharmaceuticals", "equities", "KRD", 87.0, 0.013, {"market": 0.50}),
    ("PELV", "Pelvane Telecom", "equities", "KRD", 12.4, 0.011, {"market": 0.55}),
    ("SARN", "Sarnow Banking Group", "equities", "KRD", 55.0, 0.017,
     {"market": 0.65, "credit": 0.30}),
    ("MRBX", "Marrowbeck Retail", "equities", "KRD", 20.0, 0.018, {"market": 0.60}),
    ("TEZ02", "Tezar 2-year note future", "rates", "TZP", 101.5, 0.0015,
     {"rates": 0.80, "market": -0.10}),
    ("TEZ05", "Tezar 5-year note future", "rates", "TZP", 108.0, 0.003,
     {"rates": 0.90, "market": -0.20}),
    ("TEZ10", "Tezar 10-year bond future", "rates", "TZP", 112.0, 0.005,
     {"rates": 0.75, "market": -0.40}),
    ("TEZ30", "Tezar 30-year bond future", "rates", "TZP", 125.0, 0.008,
     {"rates": 0.70, "market": -0.35}),
    ("VLM10", "Valmer 10-year bond future", "rates", "VLM", 131.0, 0.005,
     {"rates": 0.60, "market": -0.25, "currency": 0.20}),
    ("OLM1", "Olmeth light crude, front contract", "commodities", "KRD", 74.0, 0.021,
     {"energy": 0.95, "market": 0.20}),
    ("OLM2", "Olmeth light crude, second contract", "commodities", "KRD", 73.2, 0.019,
     {"energy": 0.94, "market": 0.20}),
    ("GSV1", "Gasvane natural gas, front contract", "commodities", "KRD", 3.1, 0.030,
     {"energy": 0.45}),
    ("RDM1", "Redmarsh copper, front contract", "commodities", "KRD", 8900.0, 0.015,
     {"market": 0.45, "industrials": 0.30}),
    ("ZNT1", "Zentmoor zinc, front contract", "commodities", "KRD", 2650.0, 0.016,
     {"market": 0.40, "industrials": 0.30}),
    ("WHB1", "Whitbarrow wheat, front contract", "commodities", "KRD", 610.0, 0.017,
     {"market": 0.10}),
    ("VLMKRD", "Valmer mark in Kordan ral", "currencies", "KRD", 1.18, 0.006,
     {"currency": 0.60, "market": -0.10}),
    ("OSNKRD", "Osnet crown in Kordan ral", "currencies", "KRD", 0.095, 0.007,
     {"currency": 0.55, "market": 0.20}),
    ("TZPKRD", "Tezar peso in Kordan ral", "currencies", "KRD", 0.052, 0.005,
     {"currency": 0.50, "rates": 0.20}),
    ("PVLKRD", "Pavolen lira in Kordan ral", "currencies", "KRD", 0.031, 0.009,
     {"currency": 0.45, "market": 0.30}),
    ("ZLFKRD", "Zelm franc in Kordan ral", "currencies", "KRD", 1.07, 0.004,
     {"currency": 0.50, "market": -0.25}),
    ("KCI5", "Kordan investment-grade credit index, 5-year", "credit", "KRD", 100.0, 0.002,
     {"credit": 0.75, "market": 0.25, "rates": 0.25}),
    ("KCH5", "Kordan high-yield credit index, 5-year", "credit", "KRD", 100.0, 0.004,
     {"credit": 0.70, "market": 0.45}),
    ("VCI5", "Valmer investment-grade credit index, 5-year", "credit", "VLM", 100.0, 0.0022,
     {"credit": 0.75, "market": 0.25, "rates": 0.20}),
    ("VCH5", "Valmer high-yield credit index, 5-year", "credit", "VLM", 100.0, 0.0045,
     {"credit": 0.70, "market": 0.45}),
    ("TCI5", "Tezar investment-grade credit index, 5-year", "credit", "TZP", 100.0, 0.0025,
     {"credit": 0.65, "market": 0.25, "rates": 0.30}),
    ("TCH5", "Tezar high-yield credit index, 5-year", "credit", "TZP", 100.0, 0.005,
     {"credit": 0.60, "market": 0.45}),
)
_DEMO_LATE_LISTINGS = {"MRBX": 3, "TCH5": 2}  # symbol -> listed after 1/n of the range
_DEMO_HOLIDAYS = ((1, 1), (3, 14), (8, 2), (12, 25), (12, 26))  # fictional Kordan calendar
_DEMO_MIN_TRADING_DAYS = 400


def demo_hedge_pairs() -> list[tuple[str, str]]:
    """Pairs the fictional desk holds against each other (both legs in the demo)."""
    return [
        ("KLV", "DUNQ"),
        ("OLM1", "OLM2"),
        ("TEZ05", "TEZ10"),
        ("KCI5", "VCI5"),
        ("SARN", "KCH5"),
    ]


def demo_holidays(start: date, end: date) -> tuple[date, ...]:
    """The fictional Kordan exchange holidays between two dates (weekends not moved)."""
    return tuple(
        date(year, month, day)
        for year in range(start.year, end.year + 1)
        for month, day in _DEMO_HOLIDAYS
        if start <= date(year, month, day) <= end
    )


def demo_scenario(start: date, end: date, seed: int = 7) -> Scenario:
    """The fictional 30-instrument desk with one episode of every kind near ``end``.

    Episodes are placed by trading days counted back from the last trading day, all
    within its last ~330 (about 16 months): a stale currency, a flipped bond future and
    a bad tick well before the end, a second (missing-close) stale stretch, a credit
    stress that ended five trading days before the end, and a hedge-pair decouple that
    runs for the last 40 trading days. The range must hold at least 400 trading days.
    """
    holidays = demo_holidays(start, end)
    days = trading_days(start, end, holidays)
    if len(days) < _DEMO_MIN_TRADING_DAYS:
        raise ConfigError(
            f"demo range {start}..{end} holds {len(days)} trading days; "
            f"needs >= {_DEMO_MIN_TRADING_DAYS}"
        )

    def back(n: int) -> date:
        """The trading day n days before the last one (back(0) is the last)."""
        return days[-1 - n].date()

    instruments = tuple(
        InstrumentSpec(
            symbol=symbol, name=name, group=group, currency=currency, start_price=price,
            vol=vol, loadings=dict(loadings),
            first_date=(
                days[len(days) // _DEMO_LATE_LISTINGS[symbol]].date()
                if symbol in _DEMO_LATE_LISTINGS else None
            ),
        )
        for symbol, name, group, currency, price, vol, loadings in _DEMO_INSTRUMENTS
    )
    episodes = (
        Episode(
            kind="stale", start=back(329), end=back(320), symbols=("ZLFKRD",),
            description=(
                "The Zelm franc feed freezes: for ten trading days ZLFKRD repeats its last "
                "close (zero returns), then jumps to the market price."
            ),
        ),
        Episode(
            kind="flip", start=back(299), end=back(200), symbols=("TEZ10",), factor="market",
            loading_scale=-1.5,
            description=(
                "For about five months the Tezar 10-year bond future moves with equities "
                "instead of against them: its loading on the market factor turns from -0.40 "
                "to +0.60, so its correlation with the equities turns from about -0.2 to "
                "about +0.35."
            ),
        ),
        Episode(
            kind="bad_tick", start=back(149), end=back(149), symbols=("GSV1",),
            tick_multiplier=10.0,
            description=(
                "One bad print: the Gasvane natural gas close is recorded ten times too "
                "high for a single day; the next close is right again."
            ),
        ),
        Episode(
            kind="stale", start=back(89), end=back(84), symbols=("PVLKRD",),
            stale_mode="missing",
            description="The Pavolen lira has no close at all for six trading days.",
        ),
        Episode(
            kind="stress", start=back(29), end=back(5), group="credit", common_weight=0.65,
            vol_scale=1.8,
            description=(
                "A credit scare: for 25 trading days a common shock carrying 65% of the "
                "variance hits every credit index, volatility is 1.8 times normal and the "
                "group's average pairwise correlation jumps from about 0.6 to above 0.8. "
                "It ended five trading days before the last day."
            ),
        ),
        Episode(
            kind="decouple", start=back(39), end=back(0), symbols=("KLV", "DUNQ"),
            description=(
                "The KLV / DUNQ hedge breaks: for the last 40 trading days (about two months) "
                "each trades on its own news with no factor exposure, so their correlation, "
                "normally about 0.77, falls to about zero."
            ),
        ),
    )
    return Scenario(
        instruments=instruments,
        factors=DEMO_FACTORS,
        start=start,
        end=end,
        seed=seed,
        episodes=episodes,
        holidays=holidays,
    )
