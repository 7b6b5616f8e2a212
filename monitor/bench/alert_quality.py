"""`comove bench alerts`: false alerts and detection delays of the shift-type rules.

An operating-characteristic table, on simulated panels, for each shift-type rule at its
defaults (``shift`` rolling:21 within rolling:126, ``shift`` rolling:63 against the previous
window, ``jump`` on rolling:63 with delta 0.3 over 5 days, ``cusum``):

* false alerts per 1,000 pair-years on constant-correlation panels (every pair 0.36 by one
  common factor), (a) normal returns, (b) Student t(4) shocks under a GARCH(1,1)-like
  common variance of persistence 0.95;
* median and 90th percentile of the detection delay (business days from the first
  changed return to the opening, both counted) for planted breaks 0.6 -> 0.3, 0.0, -0.1
  on disjoint pairs, beside Lorden's floor (Lorden 1971) at 0.01 false alerts per pair
  per year (normal information for the normal panels, Student t(4) information for the
  t panels: no detector at that false-alarm rate can do better in the worst case), and
  how many more alerts the broken pairs opened after the first one (``later_openings``:
  the same break alerting again after a clear, or the restart flapping).

The production code runs: rules built from ``[[rules]]`` tables, ``make_plan`` and
``replay`` with a fresh ``AlertBook``.
"""

from __future__ import annotations

import argparse
import json
import math
import time
from typing import Any

import numpy as np
import pandas as pd

from monitor.alerts.book import AlertBook
from monitor.alerts.replay import make_plan, replay
from monitor.rules.registry import build_rules
from monitor.rules.sequential import (
    BUSINESS_DAYS_PER_YEAR,
    LIKELIHOOD_DF,
    heavy_tailed_pairs,
    lorden_floor,
)

RULES: tuple[dict[str, Any], ...] = (
    {"name": "shift-within", "kind": "shift", "measure": "rolling:21", "baseline": "rolling:126"},
    {"name": "shift-previous", "kind": "shift", "compare": "previous", "measure": "rolling:63"},
    {"name": "jump", "kind": "jump", "measure": "rolling:63", "delta": 0.3, "over_days": 5},
    {"name": "cusum", "kind": "cusum"},
)
"""``jump`` has no default ``delta``; 0.3 over 5 days is the desk example of the
backfill bench."""
TAILS = ("normal", "t-garch")
BREAKS = (0.3, 0.0, -0.1)
BEFORE = 0.6
CONSTANT = 0.36
WARM_UP = 400
"""Rows simulated before the counted span: the standardisation and the cusum's 378-row
window fill up here, so every rule is at risk for the whole counted span."""
FALSE_ALARMS = 0.01
GARCH_ALPHA, GARCH_BETA = 0.08, 0.87
"""Persistence alpha + beta = 0.95."""


def _shocks(rng: np.random.Generator, size: tuple[int, ...], tail: str) -> np.ndarray:
    if tail == "normal":
        return rng.standard_normal(size)
    # Student t(4) scaled to unit variance: sqrt((df - 2) / df) * t.
    return rng.standard_t(4.0, size) * math.sqrt(0.5)


def _volatility(rng: np.random.Generator, days: int, tail: str) -> np.ndarray:
    """Daily volatility (days, 1): 1 % for normal panels, a common GARCH(1,1) path of
    long-run 1 % and persistence 0.95 for the t panels."""
    if tail == "normal":
        return np.full((days, 1), 0.01)
    shocks = _shocks(rng, (days,), tail)
    variance = np.empty(days)
    level = 1.0
    for t in range(days):
        variance[t] = level
        level = (1 - GARCH_ALPHA - GARCH_BETA) + GARCH_ALPHA * level * shocks[t] ** 2 \
            + GARCH_BETA * level
    return 0.01 * np.sqrt(variance)[:, None]


def constant_panel(seed: int, instruments: int, days: int, tail: str) -> np.ndarray:
    """Returns (WARM_UP + days, instruments), every pair correlated 0.36 (loading 0.6)."""
    rng = np.random.default_rng(seed)
    rows = WARM_UP + days
    loading = math.sqrt(CONSTANT)
    common = _shocks(rng, (rows, 1), tail)
    own = _shocks(rng, (rows, instruments), tail)
    return _volatility(rng, rows, tail) * (loading * common + math.sqrt(1 - loading**2) * own)


def break_panel(seed: int, pairs: int, days: int, tail: str, after: float,
                break_rows: np.ndarray) -> np.ndarray:
    """Returns (days, 2 * pairs): pair k is columns 2k, 2k+1, correlated 0.6 before row
    ``break_rows[k]`` and ``after`` from it on; pairs are independent of each other."""
    rng = np.random.default_rng(seed)
    first = _shocks(rng, (days, pairs), tail)
    other = _shocks(rng, (days, pairs), tail)
    rho = np.where(np.arange(days)[:, None] >= break_rows[None, :], after, BEFORE)
    second = rho * first + np.sqrt(1 - rho**2) * other
    volatility = _volatility(rng, days, tail)
    out = np.empty((days, 2 * pairs))
    out[:, 0::2] = volatility * first
    out[:, 1::2] = volatility * second
    return out


def t_floor(rho0: float, rho1: float, false_alarms: float, draws: int = 400_000) -> float:
    """Lorden's floor for unit-variance bivariate Student t(4) pairs: log(ARL0) over the
    Kullback-Leibler information of t(rho1) against t(rho0), the information estimated
    by a seeded Monte Carlo mean of the log-likelihood ratio (relative error about 1 %)."""
    x, y = heavy_tailed_pairs(np.random.default_rng(7), draws, np.array([rho1]), cap=math.inf)
    a, b = x * x + y * y, x * y

    def log_density(rho: float) -> np.ndarray:
        q = 1.0 - rho * rho
        return -0.5 * math.log(q) - 0.5 * (LIKELIHOOD_DF + 2.0) * np.log1p(
            (a - 2.0 * rho * b) / (q * (LIKELIHOOD_DF - 2.0)))

    information = float(np.mean(log_density(rho1) - log_density(rho0)))
    return math.log(BUSINESS_DAYS_PER_YEAR / false_alarms) / information


def _run(returns: np.ndarray, tables: list[dict[str, Any]]) -> dict[str, list[tuple[int, str]]]:
    """Replay the rules over a panel; per rule, the (row, target) of every opening."""
    symbols = [f"SIM{k:03d}" for k in range(returns.shape[1])]
    rules = build_rules(tables, symbols=symbols, groups={})
    dates = [d.date() for d in pd.bdate_range("2010-01-04", periods=returns.shape[0])]
    plan = make_plan(rules, symbols, level=0.95)
    opened: dict[str, list[tuple[int, str]]] = {rule.name: [] for rule in rules}
    for day in replay(returns, dates, plan, AlertBook()):
        for event in day.events:
            if event.event == "opened":
                opened[event.rule].append((day.t, event.target))
    return opened


def _quantile(values: list[float], q: float) -> float | None:
    """Nearest-rank quantile (missed breaks are +inf); None when it is a missed break."""
    if not values:
        return None
    ranked = sorted(values)
    found = ranked[max(0, math.ceil(q * len(ranked)) - 1)]
    return found if math.isfinite(found) else None


def run(*, quick: bool = False) -> dict[str, Any]:
    instruments, days = (12, 504) if quick else (40, 2520)
    break_pairs, follow = (8, 200) if quick else (60, 300)
    started = time.perf_counter()
    false_alerts: dict[str, dict[str, float]] = {}
    delays: dict[str, dict[str, dict[str, Any]]] = {}
    pair_years = instruments * (instruments - 1) // 2 * days / 252
    for k, tail in enumerate(TAILS):
        returns = constant_panel(100 + k, instruments, days, tail)
        tables = [dict(table, all=True) for table in RULES]
        opened = _run(returns, tables)
        false_alerts[tail] = {
            name: round(1000 * sum(1 for t, _ in rows if t >= WARM_UP) / pair_years, 2)
            for name, rows in opened.items()
        }
        delays[tail] = {}
        for m, after in enumerate(BREAKS):
            rng = np.random.default_rng(200 + 10 * k + m)
            length = WARM_UP + 400 + follow
            break_rows = rng.integers(WARM_UP + 200, WARM_UP + 400, break_pairs)
            panel = break_panel(300 + 10 * k + m, break_pairs, length, tail, after, break_rows)
            labels = [f"SIM{2 * p:03d}/SIM{2 * p + 1:03d}" for p in range(break_pairs)]
            tables = [dict(table, pairs=labels) for table in RULES]
            found = _run(panel, tables)
            row: dict[str, Any] = {}
            for name, rows in found.items():
                first: dict[str, int] = {}
                repeats = 0
                for t, target in rows:
                    p = labels.index(target)
                    if t >= break_rows[p] and target not in first:
                        first[target] = t - int(break_rows[p]) + 1
                    elif t >= break_rows[p]:
                        repeats += 1
                waits = [float(first.get(label, math.inf)) for label in labels]
                row[name] = {
                    "median": _quantile(waits, 0.5), "p90": _quantile(waits, 0.9),
                    "missed": sum(1 for w in waits if math.isinf(w)), "breaks": break_pairs,
                    "later_openings": repeats,
                }
            delays[tail][f"{BEFORE}->{after}"] = row
    floors = {
        "normal": {f"{BEFORE}->{after}": round(lorden_floor(BEFORE, after, FALSE_ALARMS), 1)
                   for after in BREAKS},
        "t-garch": {f"{BEFORE}->{after}": round(t_floor(BEFORE, after, FALSE_ALARMS), 1)
                    for after in BREAKS},
    }
    return {
        "instruments": instruments, "days": days, "pair_years": pair_years,
        "breaks_per_size": break_pairs, "follow_days": follow,
        "rules": [table["name"] for table in RULES],
        "false_alerts_per_1000_pair_years": false_alerts,
        "delay_business_days": delays,
        "lorden_floor_business_days": floors,
        "false_alarms_for_floor": FALSE_ALARMS,
        "seconds": round(time.perf_counter() - started, 1),
    }


def _cell(entry: dict[str, Any], follow: int) -> str:
    def show(value: float | None) -> str:
        return f">{follow}" if value is None else f"{value:.0f}"
    missed = f" ({entry['missed']} missed)" if entry["missed"] else ""
    return f"{show(entry['median'])} / {show(entry['p90'])}{missed}"


def markdown(result: dict[str, Any]) -> str:
    """The README table: one row per rule, false alerts and delays per panel."""
    follow = result["follow_days"]
    breaks = list(result["lorden_floor_business_days"]["normal"])
    head = ["rule", "false alerts / 1,000 pair-years (normal)",
            "false alerts / 1,000 pair-years (t(4), GARCH)"]
    head += [f"delay {b} {tail} (median / p90)" for tail in TAILS for b in breaks]
    lines = ["| " + " | ".join(head) + " |", "|" + " --- |" * len(head)]
    for name in result["rules"]:
        cells = [name] + [str(result["false_alerts_per_1000_pair_years"][t][name]) for t in TAILS]
        cells += [_cell(result["delay_business_days"][tail][b][name], follow)
                  for tail in TAILS for b in breaks]
        lines.append("| " + " | ".join(cells) + " |")
    floor = ["Lorden's floor at 0.01 / pair-year (normal; t(4) for the t columns)", "", ""]
    floor += [f"{result['lorden_floor_business_days'][tail][b]}" for tail in TAILS
              for b in breaks]
    lines.append("| " + " | ".join(floor) + " |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="comove bench alerts", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--quick", action="store_true", help="small sizes, for a smoke test")
    parser.add_argument("--markdown", action="store_true", help="print the README table")
    args = parser.parse_args(argv)
    result = run(quick=args.quick)
    if args.json:
        print(json.dumps(result, indent=1))
    elif args.markdown:
        print(markdown(result))
    else:
        print(f"alerts bench: {result['instruments']} instruments x {result['days']} days "
              f"({result['pair_years']:,.0f} pair-years per panel), "
              f"{result['breaks_per_size']} breaks per size, {result['seconds']} s")
        print(markdown(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

