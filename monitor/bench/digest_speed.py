"""Benchmark of the evening digest: render a large desk's digest, charts included.

Builds a seeded synthetic context (fictional desk, default 500 instruments in 5 groups,
50 new alerts each with a year of history) and times `render_digest` and `build_message`.
Prints the figures against the target (under 10 seconds for the full size); `--json`
prints one JSON object instead, `--quick` runs a small size for smoke tests.

Run: ``python -m monitor.bench.digest_speed [--quick] [--json]``.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Sequence
from datetime import UTC, date, datetime

import numpy as np

from monitor import __version__
from monitor.calendar import Schedule, run_dates_ending
from monitor.digest.context import (
    AlertHistory,
    AlertView,
    DataIssueView,
    DigestContext,
    DigestParameters,
    DriverView,
    GroupAverageView,
    HeatmapView,
    Instrument,
    MoverView,
)
from monitor.digest.message import build_message
from monitor.digest.render import render_digest

TARGET_SECONDS = 10.0
"""Full-size target: 500 instruments, 5 groups, 50 new alerts, charts included."""

_GROUPS = (
    ("Kelvara Industrials", "KLV"),
    ("Orma Utilities", "ORM"),
    ("Tezzin Rates", "TEZ"),
    ("Vallow Metals", "VLW"),
    ("Quenby Consumer", "QNB"),
    ("Rusk Transport", "RSK"),
)

WEEKDAYS = Schedule()
"""Monday to Friday, no holidays: the synthetic calendar."""



def synthetic_context(
    instruments: int = 500, groups: int = 5, new_alerts: int = 50, seed: int = 7
) -> DigestContext:
    """Build a seeded digest context for a fictional desk.

    Parameters
    ----------
    instruments : int
        Instruments in total, split evenly over the groups.
    groups : int
        Number of groups, 1 to 6.
    new_alerts : int
        New alerts, each with 252 days of history and five driver days.
    seed : int
        Seed of the random generator; the same seed gives the same context.

    Returns
    -------
    DigestContext
        With continuing, acknowledged and cleared alerts, movers, group_averages, data issues
        and one heatmap per group (correlations from a one-factor-per-group model).
    """
    rng = np.random.default_rng(seed)
    as_of = date(2026, 3, 5)
    days = run_dates_ending(WEEKDAYS, as_of, 252)
    per_group = max(1, instruments // groups)
    members: list[list[Instrument]] = []
    heatmaps = []
    group_averages = []
    for g in range(groups):
        group_name, prefix = _GROUPS[g % len(_GROUPS)]
        group = [
            Instrument(f"{prefix}{i:03d}", f"{group_name.split()[0]} line {i}")
            for i in range(per_group)
        ]
        members.append(group)
        # Two sub-blocks per group so the heatmap ordering has structure to find.
        loadings = rng.uniform(0.3, 0.8, per_group)
        block = rng.integers(0, 2, per_group)
        same = block[:, None] == block[None, :]
        matrix = np.where(same, np.outer(loadings, loadings), 0.2 * np.outer(loadings, loadings))
        np.fill_diagonal(matrix, 1.0)
        heatmaps.append(HeatmapView(group_name, [m.symbol for m in group], matrix))
        history = np.clip(0.4 + np.cumsum(rng.normal(0, 0.01, 63)), -1, 1)
        group_averages.append(GroupAverageView(
            group_name, float(history[-1]), float(history[-22]),
            pairs_used=per_group * (per_group - 1) // 2, instruments=per_group,
            history_dates=days[-63:], history_values=history,
        ))
    universe = [m for group in members for m in group]
    severities = ("critical", "warning", "info")

    def alert(i: int, state: str) -> AlertView:
        a, b = rng.choice(len(universe), 2, replace=False)
        values = np.clip(0.3 + np.cumsum(rng.normal(0, 0.02, len(days))), -0.99, 0.99)
        values[rng.integers(0, len(days) - 20):][:5] = np.nan
        half = 0.15
        is_shift = i % 3 == 0
        value = float(values[-1]) if np.isfinite(values[-1]) else 0.5
        return AlertView(
            id=1000 + i if state == "new" else 5000 + i,
            severity=severities[i % 3],  # type: ignore[arg-type]
            rule_name="regime shift" if is_shift else "hedge level",
            rule_kind="shift" if is_shift else "level",
            a=universe[int(a)], b=universe[int(b)],
            measure="rolling:63", value=value,
            band_low=value - half, band_high=value + half,
            level=None if is_shift else 0.8, clear_level=None if is_shift else 0.7,
            direction="" if is_shift else "above",
            strength="strong", p_value=float(rng.uniform(0, 0.01)) if is_shift else None,
            z=float(rng.normal(3, 0.5)) if is_shift else None,
            baseline=0.2 if is_shift else None,
            days_held=int(rng.integers(1, 10)), opened=days[-5], state=state,
            acknowledged_by="r.okafor" if state == "acknowledged" else None,
            acknowledged_at=datetime(2026, 3, 4, 9, 15, tzinfo=UTC)
            if state == "acknowledged" else None,
            drivers=[
                DriverView(days[-k - 1], float(rng.normal(0, 0.05)),
                           float(rng.normal(0, 0.01)), float(rng.normal(0, 0.01)))
                for k in range(8)
            ],
            history=AlertHistory(days, values, values - half, values + half)
            if state == "new" else None,
            observations=63.0,
        )

    movers = [
        MoverView(universe[i], universe[-1 - i], "ewma:hl=21",
                  float(rng.uniform(-1, 1)), float(rng.uniform(-1, 1)))
        for i in range(min(10, len(universe) // 2))
    ]
    return DigestContext(
        desk="Kelvara Rates & Hedges",
        as_of=as_of,
        data_through=as_of,
        generated_at=datetime(2026, 3, 5, 18, 30, tzinfo=UTC),
        parameters=DigestParameters(("rolling:63", "ewma:hl=21"), (63.0, 61.0), "log"),
        version=__version__,
        new_alerts=[alert(i, "new") for i in range(new_alerts)],
        continuing=[alert(i, "continuing") for i in range(5)],
        acknowledged=[alert(i, "acknowledged") for i in range(3)],
        cleared=[alert(i, "cleared") for i in range(2)],
        movers=movers,
        group_averages=group_averages,
        data_quality=[DataIssueView("stale", universe[0].symbol, days[-3], "no close for 2 days")],
        heatmaps=heatmaps,
    )


def run(instruments: int, groups: int, new_alerts: int) -> dict[str, object]:
    """Time one render and one message build; return the figures as a dict."""
    start = time.perf_counter()
    ctx = synthetic_context(instruments, groups, new_alerts)
    built = time.perf_counter()
    rendered = render_digest(ctx)
    rendered_at = time.perf_counter()
    message = build_message(
        rendered, sender="digest@kelvara.invalid", recipients=["desk@kelvara.invalid"],
        date=datetime(2026, 3, 5, 18, 31, tzinfo=UTC),
    )
    size = len(message.as_bytes())
    done = time.perf_counter()
    total = done - built
    return {
        "instruments": instruments,
        "groups": groups,
        "new_alerts": new_alerts,
        "images": len(rendered.images),
        "context_seconds": round(built - start, 4),
        "render_seconds": round(rendered_at - built, 4),
        "message_seconds": round(done - rendered_at, 4),
        "total_seconds": round(total, 4),
        "target_seconds": TARGET_SECONDS,
        "within_target": total < TARGET_SECONDS,
        "html_bytes": len(rendered.html_for_email.encode("utf-8")),
        "message_bytes": size,
    }


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmark and print its figures; returns 0."""
    parser = argparse.ArgumentParser(
        prog="python -m monitor.bench.digest_speed", description=__doc__)
    parser.add_argument("--quick", action="store_true", help="small size for a smoke test")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    args = parser.parse_args(argv)
    if args.quick:
        figures = run(instruments=20, groups=2, new_alerts=3)
    else:
        figures = run(instruments=500, groups=5, new_alerts=50)
    if args.json:
        print(json.dumps(figures))
    else:
        verdict = "within" if figures["within_target"] else "OVER"
        print(
            f"digest: {figures['instruments']} instruments, {figures['groups']} groups, "
            f"{figures['new_alerts']} new alerts, {figures['images']} charts\n"
            f"  render  {figures['render_seconds']:.2f} s\n"
            f"  message {figures['message_seconds']:.2f} s\n"
            f"  total   {figures['total_seconds']:.2f} s ({verdict} target of "
            f"{TARGET_SECONDS:.0f} s)\n"
            f"  html {figures['html_bytes']} bytes, message {figures['message_bytes']} bytes"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
