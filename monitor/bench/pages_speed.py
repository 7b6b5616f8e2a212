"""Benchmark of the alert history site: build a large desk's site, charts included.

Builds a seeded, made-up context (a fictional desk; by default 500 pairs with two measures
and three years of history each, and 2,000 alerts with their events, acknowledgements and
driver days), then times `monitor.pages.build_site` into a fresh temporary folder and a
second build over the first (nothing changed, so nothing is rewritten). Prints the figures
against the target (under 60 seconds for the full size); `--json` prints one JSON object
instead, `--quick` runs a small size for smoke tests.

Run: ``python -m monitor.bench.pages_speed [--quick] [--json]``.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import tempfile
import time
from collections.abc import Sequence
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import cast

import numpy as np

from monitor import __version__
from monitor.calendar import Schedule, run_dates_ending
from monitor.pages.context import (
    AckView,
    AlertSpan,
    AlertSummary,
    DigestLink,
    DriverRow,
    DriversView,
    EventView,
    InstrumentView,
    MeasureHistory,
    PairPage,
    RulePage,
    RunView,
    SiteContext,
    SiteParameters,
    TargetPage,
)
from monitor.pages.write import build_site

TARGET_SECONDS = 60.0
"""Full-size target for one build from empty: 500 pairs, 2,000 alerts."""

_GROUPS = (
    ("Industrials", "KLV", "Kelvara"),
    ("Utilities", "ORM", "Orma"),
    ("Rates", "TEZ", "Tezran"),
    ("Metals", "VLW", "Vallow"),
    ("Consumer", "QNB", "Quenby"),
)
_SEVERITIES = ("critical", "warning", "info")
_PEOPLE = ("r.okafor", "m.lindqvist", "a.teixeira", "j.brandt")
_RULES = (
    RulePage("hedge level", "level", "critical", "rolling:63",
             (("level", "0.60"), ("direction", "below"), ("clear_level", "0.65"),
              ("hold", "2"))),
    RulePage("fast hedge level", "level", "warning", "ewma:hl=21",
             (("level", "0.50"), ("direction", "below"), ("clear_level", "0.55"))),
    RulePage("regime shift", "shift", "warning", "rolling:21 vs rolling:126",
             (("compare", "within"), ("baseline", "rolling:126"), ("false_alarms", "0.01"))),
    RulePage("sign flip", "sign", "info", "ewma:hl=21", (("hold", "3"),)),
    RulePage("group average", "group-average", "warning", "rolling:63", (("level", "0.80"),)),
    RulePage("stale closes", "stale", "info", "", (("after_days", "3"),)),
)

WEEKDAYS = Schedule()
"""Monday to Friday, no holidays: the synthetic calendar."""



def _history(
    rng: np.random.Generator, measure: str, days: list[date], window: int, n: float
) -> MeasureHistory:
    steps = rng.normal(0.0, 0.03, len(days))
    values = np.clip(0.5 + np.cumsum(steps) * 0.4, -0.98, 0.98)
    values[: min(window - 1, len(days))] = np.nan
    # Fisher z band at 95 % (q = 1.96), common practice for a correlation's noise band.
    half = 1.96 / math.sqrt(n - 3.0)
    with np.errstate(invalid="ignore"):
        z = np.arctanh(values)
    return MeasureHistory(measure, days, values, np.tanh(z - half), np.tanh(z + half),
                          levels=(0.6,) if measure == "rolling:63" else (0.5,))


def synthetic_context(
    pairs: int = 500, alerts: int = 2000, days: int = 756, seed: int = 11
) -> SiteContext:
    """Build a seeded history-site context for a fictional desk.

    Parameters
    ----------
    pairs : int
        Monitored pairs, each with two measure histories ("rolling:63", "ewma:hl=21").
    alerts : int
        Alerts in total: about 95 % on pairs, the rest on groups and single instruments.
    days : int
        Business days of history per measure (756 is three years).
    seed : int
        Seed of the random generator; the same seed gives the same context.

    Returns
    -------
    SiteContext
        With rules, events (opened, reminders, cleared), acknowledgements with notes,
        driver days, a runs ledger and digest links.
    """
    rng = np.random.default_rng(seed)
    as_of = date(2026, 3, 5)
    calendar = run_dates_ending(WEEKDAYS, as_of, days)
    per_group = max(2, math.ceil(math.sqrt(2 * pairs / len(_GROUPS))) + 2)
    instruments: list[InstrumentView] = []
    for group, prefix, house in _GROUPS:
        instruments += [
            InstrumentView(f"{prefix}{i:02d}", f"{house} line {i}", group)
            for i in range(per_group)
        ]
    universe = len(instruments)
    chosen: list[tuple[int, int]] = []
    seen: set[tuple[int, int]] = set()
    while len(chosen) < min(pairs, universe * (universe - 1) // 2):
        i, j = sorted(int(k) for k in rng.choice(universe, 2, replace=False))
        if (i, j) not in seen:
            seen.add((i, j))
            chosen.append((i, j))

    pair_alerts = alerts - alerts // 20
    summaries: list[AlertSummary] = []
    spans: dict[int, list[AlertSpan]] = {k: [] for k in range(len(chosen))}
    events: dict[int, list[EventView]] = {k: [] for k in range(len(chosen))}
    acks: dict[int, list[AckView]] = {k: [] for k in range(len(chosen))}
    drivers: dict[int, list[DriversView]] = {k: [] for k in range(len(chosen))}
    pair_rules = [rule for rule in _RULES if rule.kind in ("level", "shift", "sign")]
    first_day = min(len(calendar) - 1, 63)
    for alert_id in range(1, alerts + 1):
        on_pair = alert_id <= pair_alerts
        rule = pair_rules[alert_id % len(pair_rules)] if on_pair else (
            _RULES[4] if alert_id % 2 else _RULES[5])
        start = int(rng.integers(first_day, len(calendar)))
        length = int(rng.integers(1, 40))
        end = start + length if start + length < len(calendar) else None
        retracted = alert_id % 97 == 0
        state = "retracted" if retracted else "open" if end is None else "cleared"
        acked = rng.random() < 0.5
        person = _PEOPLE[alert_id % len(_PEOPLE)] if acked else None
        peak = float(rng.uniform(-0.2, 0.95))
        if on_pair:
            k = int(rng.integers(0, len(chosen)))
            a, b = (instruments[i] for i in chosen[k])
            target: tuple[str, ...] = (a.symbol, b.symbol)
            kind = "pair"
        elif rule.kind == "group-average":
            k = -1
            target, kind = (_GROUPS[alert_id % len(_GROUPS)][0],), "group"
        else:
            k = -1
            target, kind = (instruments[alert_id % universe].symbol,), "instrument"
        summaries.append(AlertSummary(
            id=alert_id, state=state, severity=rule.severity,  # type: ignore[arg-type]
            rule_name=rule.name, rule_kind=rule.kind, target_kind=kind,  # type: ignore[arg-type]
            target=target, opened=calendar[start],
            cleared=calendar[end] if end is not None and not retracted else None,
            peak=peak, acknowledged_by=person, measure=rule.measure,
        ))
        if k < 0:
            continue
        spans[k].append(AlertSpan(alert_id, calendar[start],
                                  calendar[end] if end is not None else None,
                                  rule.name, rule.severity, rule.measure))
        for day in range(start, end if end is not None else len(calendar), 5):
            events[k].append(EventView(
                calendar[day], alert_id, rule.name, "opened" if day == start else "continuing",
                value=float(rng.uniform(-0.5, 0.9)), level=0.6, band_low=0.3, band_high=0.8,
                p_value=float(rng.uniform(0, 0.01)) if rule.kind == "shift" else None,
                observations=63.0,
            ))
        if end is not None:
            events[k].append(EventView(calendar[end], alert_id, rule.name, "cleared",
                                       value=0.66, level=0.65, observations=63.0))
        if person is not None:
            acks[k].append(AckView(
                alert_id, person,
                datetime.combine(calendar[start], datetime.min.time(), UTC)
                + timedelta(hours=9, minutes=int(rng.integers(0, 300))),
                "Checked with the desk: roll of the hedge book.\nWatching into month end.",
            ))
        drivers[k].append(DriversView(alert_id, calendar[start], [
            DriverRow(calendar[max(0, start - d)], float(rng.normal(0, 0.05)),
                      float(rng.normal(0, 0.012)), float(rng.normal(0, 0.012)))
            for d in range(5)
        ]))

    pages = []
    for k, (i, j) in enumerate(chosen):
        pages.append(PairPage(
            instruments[i], instruments[j],
            measures=[_history(rng, "rolling:63", calendar, 63, 63.0),
                      _history(rng, "ewma:hl=21", calendar, 21, 61.0)],
            spans=spans[k], events=events[k], acknowledgements=acks[k], drivers=drivers[k],
        ))
    targets = [
        TargetPage("group", group, f"{house} and peers",
                   members=[m.symbol for m in instruments if m.group == group])
        for group, _, house in _GROUPS
    ]
    runs = [
        RunView(n, "daily", calendar[-1 - n], "done" if n % 50 else "failed",
                datetime.combine(calendar[-1 - n], datetime.min.time(), UTC)
                + timedelta(hours=18, minutes=30),
                finished=datetime.combine(calendar[-1 - n], datetime.min.time(), UTC)
                + timedelta(hours=18, minutes=31),
                duration_seconds=float(rng.uniform(20, 90)),
                counts={"closes": universe, "alerts opened": int(rng.integers(0, 5))},
                error="" if n % 50 else "store: database is locked")
        for n in range(min(250, len(calendar) - 1))
    ]
    digests = [
        DigestLink(calendar[-1 - n], f"digests/{calendar[-1 - n].isoformat()}/digest.html",
                   f"Kelvara Rates & Hedges: correlation digest {calendar[-1 - n].isoformat()}",
                   "sent")
        for n in range(min(250, len(calendar)))
    ]
    return SiteContext(
        desk="Kelvara Rates & Hedges",
        generated_at=datetime(2026, 3, 5, 18, 45, tzinfo=UTC),
        data_through=as_of,
        version=__version__,
        parameters=SiteParameters(("rolling:63", "ewma:hl=21"), "log", 0.95),
        alerts=summaries,
        pairs=pages,
        rules=_RULES,
        runs=runs,
        digests=digests,
        groups={m.symbol: m.group for m in instruments},
        targets=targets,
    )


def run(pairs: int, alerts: int, days: int, workers: int | None = None) -> dict[str, object]:
    """Time one build from empty and one rebuild over it; return the figures as a dict.

    `workers` is passed to `build_site` (None: its default, one process per CPU up to 4).
    """
    start = time.perf_counter()
    ctx = synthetic_context(pairs, alerts, days)
    built = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="comove-bench-pages-") as folder:
        first = build_site(ctx, Path(folder), workers=workers)
        first_done = time.perf_counter()
        second = build_site(ctx, Path(folder), workers=workers)
        second_done = time.perf_counter()
        size = sum(p.stat().st_size for p in Path(folder).rglob("*") if p.is_file())
    build_seconds = first_done - built
    return {
        "pairs": len(ctx.pairs),
        "alerts": len(ctx.alerts),
        "days": days,
        "charts": sum(1 for f in first.files if f.endswith(".svg") and "/" in f),
        "files": len(first.files),
        "workers": "default" if workers is None else workers,
        "charts_drawn": first.charts_drawn,
        "rebuild_charts_drawn": second.charts_drawn,
        "written": first.written,
        "rebuild_written": second.written,
        "rebuild_unchanged": second.unchanged,
        "context_seconds": round(built - start, 4),
        "build_seconds": round(build_seconds, 4),
        "rebuild_seconds": round(second_done - first_done, 4),
        "site_bytes": size,
        "target_seconds": TARGET_SECONDS,
        "within_target": build_seconds < TARGET_SECONDS,
    }


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmark and print its figures; returns 0."""
    parser = argparse.ArgumentParser(
        prog="python -m monitor.bench.pages_speed", description=__doc__)
    parser.add_argument("--quick", action="store_true", help="small size for a smoke test")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--workers", type=int, default=None,
                        help="chart processes (default: one per CPU, at most 4)")
    args = parser.parse_args(argv)
    if args.quick:
        figures = run(pairs=8, alerts=40, days=130, workers=args.workers)
    else:
        figures = run(pairs=500, alerts=2000, days=756, workers=args.workers)
    if args.json:
        print(json.dumps(figures))
    else:
        verdict = "within" if figures["within_target"] else "OVER"
        print(
            f"pages: {figures['pairs']} pairs, {figures['alerts']} alerts, "
            f"{figures['days']} days, {figures['charts']} charts, {figures['files']} files, "
            f"workers {figures['workers']}\n"
            f"  build   {figures['build_seconds']:.2f} s ({verdict} target of "
            f"{TARGET_SECONDS:.0f} s)\n"
            f"  rebuild {figures['rebuild_seconds']:.2f} s "
            f"({figures['rebuild_unchanged']} files unchanged, "
            f"{figures['rebuild_written']} written, "
            f"{figures['rebuild_charts_drawn']} charts drawn)\n"
            f"  site    {cast(int, figures['site_bytes']) / 1e6:.1f} MB"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
