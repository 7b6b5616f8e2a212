"""Benchmark of the correlation engine: speed against pandas and polars, the daily run, memory.

Prints, side by side on the same seeded returns (a fictional desk of N instruments driven
by three factors):

* ``rolling:63`` and ``ewma:hl=21,min=1`` over N = 200 instruments and T = 2,520 days: engine
  time, pandas time (``df.rolling(63).corr()``, ``df.ewm(halflife=21).corr()``), polars time
  (``pl.rolling_corr`` of every pair; for the EWMA, ``ewm_mean`` of x, y, xy, x^2, y^2 of
  every pair), the ratios and the largest difference from pandas of each (targets: 60x
  pandas, 5x polars, 1e-10), on gap-free returns and on returns with the gaps of real
  markets: the instruments are spread over five exchanges (:data:`MARKETS`), each missing
  on its own exchange's closed days (the session calendars of ``exchange_calendars``), plus
  0.5 % of instrument-days missing at random (targets: 30x pandas, 5x polars). With gaps
  the rolling window needs 40 of its 63 days (``rolling:63,min=40``; pandas
  ``min_periods=40``; polars is given both sides masked to the pair's common days);
* the floor: one pass of the least arithmetic a clean rolling pass needs (a rank-two
  update of the window cross products and two scalings per day, in numpy);
* the daily run for N = 2,000 instruments (about 2 M pairs) from 252 trailing days
  (target < 1 s per measure; < 0.3 s with gaps);
* a full streamed pass for N = 500, T = 2,520 (``rolling:63``) in a fresh subprocess:
  peak traced memory (tracemalloc) and the subprocess's own peak resident set (``VmHWM``;
  ``ru_maxrss`` where /proc is missing) (target < 1.5 GB).

Times are wall-clock (best of a few runs for the engine; pandas and polars once, they are
slow); CPU times are printed too, because the machine may be shared (polars uses every
core, so its CPU time can exceed its wall time). ``--quick`` shrinks every size for a smoke
test; ``--json`` prints the figures as JSON.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
import warnings
from collections.abc import Callable
from functools import lru_cache, partial
from typing import Any

import numpy as np
import pandas as pd

from monitor._typing import Returns2D
from monitor.engine import one_day, stream
from monitor.engine.layout import BoolArray

RATIO_TARGET = 60.0
GAPPY_RATIO_TARGET = 30.0
POLARS_RATIO_TARGET = 5.0
DIFFERENCE_TARGET = 1e-10
ONE_DAY_TARGET_S = 1.0
ONE_DAY_GAPPY_TARGET_S = 0.3
MEMORY_TARGET_BYTES = 1.5 * 2**30
REGRESSION_TARGET = 2.0
"""A ``beta:`` / ``r2:`` measure takes at most this many times its correlation's time."""

MARKETS = ("XNYS", "XLON", "XETR", "XTKS", "XHKG")
"""Exchanges whose closed days make the gaps (instrument k trades on MARKETS[k % 5])."""
RANDOM_GAP_SHARE = 0.005
GAPPY_MIN = 40
"""Common days a 63-day window needs in the gappy rows (pandas ``min_periods``)."""
LAST_SESSION = "2025-12-31"


@lru_cache(maxsize=4)
def _sessions(first_year: int) -> tuple[pd.DatetimeIndex, tuple[pd.DatetimeIndex, ...]]:
    """The union of the markets' sessions from ``first_year`` to :data:`LAST_SESSION`, and
    each market's own sessions."""
    with warnings.catch_warnings():
        # the calendar package trips deprecation notices of newer pandas releases
        for category in (DeprecationWarning, FutureWarning, PendingDeprecationWarning):
            warnings.simplefilter("ignore", category)
        import exchange_calendars

        own = tuple(
            exchange_calendars.get_calendar(
                code, start=f"{first_year}-01-01", end=LAST_SESSION
            ).sessions
            for code in MARKETS
        )
    union = own[0]
    for sessions in own[1:]:
        union = union.union(sessions)
    return union, own


def market_days(
    rows: int, columns: int, seed: int = 20260101
) -> tuple[pd.DatetimeIndex, BoolArray]:
    """The last ``rows`` days of the union of the five markets' sessions, and (rows,
    columns) True where an instrument has no value: its market is closed that day, or the
    value is missing at random (:data:`RANDOM_GAP_SHARE`)."""
    years = rows // 240 + 2
    union, own = _sessions(int(LAST_SESSION[:4]) - years)
    dates = union[-rows:]
    closed = np.column_stack([~dates.isin(sessions) for sessions in own])
    missing = closed[:, np.arange(columns) % len(MARKETS)]
    rng = np.random.default_rng(seed + 1)
    return dates, np.asarray(missing | (rng.random((rows, columns)) < RANDOM_GAP_SHARE))


def market_gaps(rows: int, columns: int, seed: int = 20260101) -> BoolArray:
    """(rows, columns) True where a return is missing (see :func:`market_days`)."""
    return market_days(rows, columns, seed)[1]


def desk_returns(rows: int, columns: int, *, gaps: bool, seed: int = 20260101) -> Returns2D:
    """Seeded daily returns of a fictional desk: three factors plus noise, ~1 % a day.

    With ``gaps``: missing on each instrument's market holidays and 0.5 % at random
    (:func:`market_gaps`).
    """
    rng = np.random.default_rng(seed)
    loadings = rng.uniform(-0.6, 0.9, size=(3, columns))
    factors = rng.standard_normal((rows, 3))
    returns = 0.01 * (factors @ loadings + rng.standard_normal((rows, columns)))
    returns[0] = np.nan  # no return on the first day
    if gaps:
        returns[market_gaps(rows, columns, seed)] = np.nan
    return returns


def _timed(fn: Callable[[], Any], repeat: int) -> tuple[float, float, Any]:
    """Best wall time and the CPU time of that run, over ``repeat`` runs."""
    best_wall, best_cpu, result = float("inf"), float("inf"), None
    for _ in range(repeat):
        wall, cpu = time.perf_counter(), time.process_time()
        result = fn()
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        if wall < best_wall:
            best_wall, best_cpu = wall, cpu
    return best_wall, best_cpu, result


def _drain(returns: Returns2D, spec: str) -> int:
    """Run a full stream, touching every day's values (what a backfill does)."""
    days = 0
    for day in stream(returns, spec):
        days += int(day.value.shape[0] > 0)
    return days


def _window(spec: str) -> tuple[int, int | None]:
    """(window, min) of a ``rolling:W[,min=M]`` spec."""
    parts = spec.split(":")[1].split(",")
    minimum = next((int(p.split("=")[1]) for p in parts[1:] if p.startswith("min=")), None)
    return int(parts[0]), minimum


def _half_life(spec: str) -> float:
    return float(spec.split("hl=")[1].split(",")[0])


def _pandas(returns: Returns2D, spec: str) -> np.ndarray:
    frame = pd.DataFrame(returns)
    with np.errstate(divide="ignore", invalid="ignore"):
        if spec.startswith("rolling"):
            window, minimum = _window(spec)
            result = frame.rolling(window, min_periods=minimum).corr()
        else:
            result = frame.ewm(halflife=_half_life(spec)).corr()
    rows, columns = returns.shape
    return result.to_numpy().reshape(rows, columns, columns)


POLARS_BATCH = 2000
"""Pairs per polars ``select`` (bounds the memory of its result)."""


def _polars_batches(returns: Returns2D, spec: str) -> Any:
    """Yield ``(pairs, values)``: polars' correlation of every pair (i < j), a batch at a
    time, values (T, batch). With gaps, both sides are masked to the pair's common days, so
    that polars (whose rolling and EWMA means skip each series' own nulls) works on the same
    days as pandas and the engine."""
    import polars as pl

    rows, columns = returns.shape
    frame = pl.DataFrame({f"c{k}": returns[:, k] for k in range(columns)}, nan_to_null=True)
    left, right = np.triu_indices(columns, 1)
    missing = np.isnan(returns)
    # masking is needed only where some instruments lack a return that others have
    mask = bool((missing.any(axis=1) & ~missing.all(axis=1)).any())
    for lo in range(0, left.size, POLARS_BATCH):
        pairs = (left[lo : lo + POLARS_BATCH], right[lo : lo + POLARS_BATCH])
        exprs = []
        for i, j in zip(*pairs, strict=True):
            x, y = pl.col(f"c{i}"), pl.col(f"c{j}")
            if mask:
                both = x.is_not_null() & y.is_not_null()
                x, y = pl.when(both).then(x), pl.when(both).then(y)
            if spec.startswith("rolling"):
                window, minimum = _window(spec)
                exprs.append(
                    pl.rolling_corr(x, y, window_size=window, min_samples=minimum or window)
                    .alias(f"p{i}_{j}")
                )
            else:
                # the EWMA correlation from exponentially weighted means (pandas' weights:
                # adjust=True, by position, gaps kept as gaps)
                def mean(e: Any) -> Any:
                    return e.ewm_mean(half_life=_half_life(spec), ignore_nulls=False)

                mx, my = mean(x), mean(y)
                cov = mean(x * y) - mx * my
                var_x, var_y = mean(x * x) - mx * mx, mean(y * y) - my * my
                exprs.append((cov / (var_x * var_y).sqrt()).alias(f"p{i}_{j}"))
        values = frame.select(exprs).to_numpy()
        yield pairs, values


def _polars(returns: Returns2D, spec: str, expected: np.ndarray) -> tuple[float, float, float]:
    """Wall and CPU seconds of polars over every pair, and its largest difference from
    pandas where both are finite (the comparison is not timed)."""
    wall = cpu = 0.0
    worst = 0.0
    batches = _polars_batches(returns, spec)
    while True:
        start_wall, start_cpu = time.perf_counter(), time.process_time()
        try:
            (left, right), values = next(batches)
        except StopIteration:
            break
        wall += time.perf_counter() - start_wall
        cpu += time.process_time() - start_cpu
        reference = expected[:, left, right]
        both = np.isfinite(values) & np.isfinite(reference)
        if both.any():
            worst = max(worst, float(np.max(np.abs(values[both] - reference[both]))))
    return wall, cpu, worst


def _compare(returns: Returns2D, spec: str, expected: np.ndarray) -> tuple[float, int]:
    """Largest |engine - pandas| where both are finite, and cells defined in one only."""
    worst, mismatched = 0.0, 0
    for day in stream(returns, spec):
        reference = expected[day.t]
        both = np.isfinite(day.value) & np.isfinite(reference)
        if both.any():
            worst = max(worst, float(np.max(np.abs(day.value[both] - reference[both]))))
        # pandas gives inf or a rounding-noise value where a window is constant
        defined_once = np.isfinite(day.value) != np.isfinite(reference)
        mismatched += int(np.count_nonzero(defined_once & ~day.stale))
    return worst, mismatched


def floor_pass(returns: Returns2D, window: int) -> int:
    """The least arithmetic of a clean rolling pass, in numpy: per day a rank-two update of
    the window's cross products (one small product and one addition) and the two scalings
    by ``1 / sqrt(sum of squares)`` of each side. No centring, checks or outputs kept."""
    x = np.nan_to_num(returns)
    rows, columns = x.shape
    scale = 1.0 / np.sqrt(np.maximum(
        np.cumsum(x * x, axis=0)[window:] - np.cumsum(x * x, axis=0)[:-window], 1e-300))
    cross = x[1 : window + 1].T @ x[1 : window + 1]
    factors = np.empty((columns, 2))
    signs = np.empty((2, columns))
    update = np.empty((columns, columns))
    days = 0
    for t in range(window + 1, rows):
        factors[:, 0], factors[:, 1] = x[t], x[t - window]
        signs[0], signs[1] = x[t], -x[t - window]
        np.matmul(factors, signs, out=update)
        cross += update
        value = cross * scale[t - window][:, None]
        value *= scale[t - window][None, :]
        days += 1
    return days


def versus_pandas(columns: int, rows: int, *, gaps: bool, repeat: int) -> list[dict[str, Any]]:
    returns = desk_returns(rows, columns, gaps=gaps)
    lines = []
    rolling = f"rolling:63,min={GAPPY_MIN}" if gaps else "rolling:63"
    # min=1: pandas' ewm() reports from a pair's second common day on, and so does this spec
    for spec in (rolling, "ewma:hl=21,min=1"):
        engine_wall, engine_cpu, _ = _timed(partial(_drain, returns, spec), repeat)
        pandas_wall, pandas_cpu, expected = _timed(partial(_pandas, returns, spec), 1)
        worst, mismatched = _compare(returns, spec, expected)
        polars_wall, polars_cpu, polars_worst = _polars(returns, spec, expected)
        del expected
        ratio = pandas_wall / engine_wall
        polars_ratio = polars_wall / engine_wall
        target = GAPPY_RATIO_TARGET if gaps else RATIO_TARGET
        lines.append(
            {
                "measure": spec,
                "instruments": columns,
                "days": rows,
                "gaps": gaps,
                "missing_share": float(np.isnan(returns[1:]).mean()),
                "engine_s": engine_wall,
                "engine_cpu_s": engine_cpu,
                "pandas_s": pandas_wall,
                "pandas_cpu_s": pandas_cpu,
                "ratio": ratio,
                "ratio_cpu": pandas_cpu / engine_cpu if engine_cpu > 0 else float("inf"),
                "max_abs_difference": worst,
                "cells_defined_in_one_only": mismatched,
                "polars_s": polars_wall,
                "polars_cpu_s": polars_cpu,
                "polars_ratio": polars_ratio,
                "polars_max_abs_difference": polars_worst,
                "ratio_target": target,
                "target_applies": True,
                "ratio_ok": ratio >= target,
                # the polars target is set for the rolling measure
                "polars_ok": polars_ratio >= POLARS_RATIO_TARGET or spec.startswith("ewma"),
                "difference_ok": worst <= DIFFERENCE_TARGET and mismatched == 0,
            }
        )
    return lines


def floor(columns: int, rows: int, repeat: int) -> dict[str, Any]:
    returns = desk_returns(rows, columns, gaps=False)
    wall, cpu, days = _timed(partial(floor_pass, returns, 63), repeat)
    return {"measure": "rolling:63", "instruments": columns, "days": rows, "seconds": wall,
            "cpu_seconds": cpu, "days_computed": days}


def daily_run(columns: int, rows: int, repeat: int) -> list[dict[str, Any]]:
    lines = []
    clean = desk_returns(rows, columns, gaps=False)
    gappy = desk_returns(rows, columns, gaps=True)
    cases = [(clean, False, spec) for spec in ("rolling:63", "rolling:252", "ewma:hl=21")]
    cases += [(gappy, True, spec) for spec in (f"rolling:63,min={GAPPY_MIN}", "ewma:hl=21")]
    for returns, gaps, spec in cases:
        wall, cpu, day = _timed(partial(one_day, returns, spec), repeat)
        target = ONE_DAY_GAPPY_TARGET_S if gaps else ONE_DAY_TARGET_S
        lines.append(
            {
                "measure": spec,
                "gaps": gaps,
                "instruments": columns,
                "trailing_days": rows,
                "pairs": columns * (columns - 1) // 2,
                "seconds": wall,
                "cpu_seconds": cpu,
                "defined": int(np.count_nonzero(np.isfinite(day.value))),
                "target_s": target,
                "ok": wall < target,
            }
        )
    return lines


_CHILD = """
import json, resource, sys, time, tracemalloc
from monitor.bench.engine_speed import desk_returns
from monitor.engine import stream
rows, columns = int(sys.argv[1]), int(sys.argv[2])
returns = desk_returns(rows, columns, gaps=False)
tracemalloc.start()
start = time.perf_counter()
days = 0
for day in stream(returns, "rolling:63"):
    days += 1
seconds = time.perf_counter() - start
current, peak = tracemalloc.get_traced_memory()
tracemalloc.stop()
ru_maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
rss = ru_maxrss
try:
    # VmHWM is this process's own peak; ru_maxrss can carry the parent's over fork + exec
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                rss = int(line.split()[1]) * 1024
except OSError:
    pass
print(json.dumps({"days": days, "seconds": seconds, "traced_peak_bytes": peak,
                  "max_rss_bytes": rss, "ru_maxrss_bytes": ru_maxrss}))
"""


def _drain_pairs(returns: Returns2D, spec: str) -> int:
    from monitor.engine import stream_on_pair_dates

    size = returns.shape[1]
    left, right = np.triu_indices(size, 1)
    days = 0
    for _ in stream_on_pair_dates(returns, spec, np.column_stack([left, right])):
        days += 1
    return days


def regression_speed(columns: int, rows: int, repeat: int) -> list[dict[str, Any]]:
    """Every pair on its own dates: ``beta:``/``r2:`` against the correlation they come from
    (returns without gaps: the own-dates path with gaps is the correlation's own cost)."""
    lines = []
    for gaps in (False,):
        returns = desk_returns(rows, columns, gaps=gaps)
        for base, derived in (("rolling:63", ("beta:63", "r2:63")),
                              ("ewma:hl=21", ("beta:hl=21", "r2:hl=21"))):
            base_wall, _, _ = _timed(partial(_drain_pairs, returns, base), repeat)
            for spec in derived:
                wall, _, _ = _timed(partial(_drain_pairs, returns, spec), repeat)
                ratio = wall / base_wall
                lines.append({"measure": spec, "versus": base, "instruments": columns,
                              "days": rows, "gaps": gaps, "seconds": wall,
                              "versus_seconds": base_wall, "ratio": ratio,
                              "target": REGRESSION_TARGET, "ok": ratio <= REGRESSION_TARGET})
    return lines


def memory_pass(columns: int, rows: int) -> dict[str, Any]:
    """A full streamed pass in a fresh interpreter, so that its peaks are its own."""
    env = dict(os.environ)
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    env["PYTHONPATH"] = root + os.pathsep + env.get("PYTHONPATH", "")
    completed = subprocess.run(
        [sys.executable, "-c", _CHILD, str(rows), str(columns)],
        capture_output=True,
        text=True,
        check=True,
        env=env,
    )
    figures: dict[str, Any] = json.loads(completed.stdout.strip().splitlines()[-1])
    figures.update(instruments=columns, rows=rows, measure="rolling:63")
    figures["ok"] = max(figures["traced_peak_bytes"], figures["max_rss_bytes"]) < (
        MEMORY_TARGET_BYTES
    )
    return figures


def run(*, json_out: bool = False, quick: bool = False) -> dict[str, Any]:
    """Run every measurement, print the table (or JSON) and return the figures."""
    # (instruments, rows) of each measurement, and runs of the engine timings
    if quick:
        compared, daily_size, streamed, repeat = (24, 200), (150, 60), (40, 200), 1
    else:
        compared, daily_size, streamed, repeat = (200, 2520), (2000, 252), (500, 2520), 3
    memory = memory_pass(*streamed)  # first, before this process grows
    versus = versus_pandas(*compared, gaps=False, repeat=repeat)
    versus += versus_pandas(*compared, gaps=True, repeat=repeat)
    daily = daily_run(*daily_size, repeat=repeat)
    least = floor(*compared, repeat=repeat)
    regression = regression_speed(*compared, repeat=repeat)
    clean_rolling = next(line for line in versus if line["measure"] == "rolling:63")
    least["engine_over_floor"] = clean_rolling["engine_s"] / least["seconds"]
    figures: dict[str, Any] = {
        "quick": quick,
        "machine": {"cpus": os.cpu_count(), "load_average": list(os.getloadavg())},
        "versus_pandas": versus,
        "floor": least,
        "one_day": daily,
        "memory": memory,
        "regression": regression,
    }
    figures["all_ok"] = bool(
        all(
            line["ratio_ok"] and line["difference_ok"] and line["polars_ok"]
            for line in versus
            if line["target_applies"]
        )
        and all(line["ok"] for line in daily)
        and all(line["ok"] for line in regression)
        and memory["ok"]
    )
    if json_out:
        print(json.dumps(figures, indent=2))
    else:
        print(_table(figures))
    return figures


def _verdict(ok: bool) -> str:
    return "pass" if ok else "FAIL"


def _table(figures: dict[str, Any]) -> str:
    machine = figures["machine"]
    load = ", ".join(f"{value:.2f}" for value in machine["load_average"])
    out = [f"comove engine benchmark ({machine['cpus']} CPUs, load average {load})", ""]
    out.append(
        f"{'measure':<18} {'N':>4} {'T':>5} {'gaps':>5} {'engine s':>9} {'pandas s':>9} "
        f"{'ratio':>6} {'cpu':>6} {'max |diff|':>9} {'polars s':>9} {'ratio':>6} "
        f"{'max |diff|':>9}  ratio  diff<=1e-10  polars"
    )
    for line in figures["versus_pandas"]:
        out.append(
            f"{line['measure']:<18} {line['instruments']:>4} {line['days']:>5} "
            f"{'yes' if line['gaps'] else 'no':>5} {line['engine_s']:>9.3f} "
            f"{line['pandas_s']:>9.2f} {line['ratio']:>6.1f} {line['ratio_cpu']:>6.1f} "
            f"{line['max_abs_difference']:>9.1e} {line['polars_s']:>9.2f} "
            f"{line['polars_ratio']:>6.1f} {line['polars_max_abs_difference']:>9.1e}  "
            f"{_verdict(line['ratio_ok'])} (>={line['ratio_target']:.0f})  "
            f"{_verdict(line['difference_ok']):>11}  {_verdict(line['polars_ok'])}"
        )
    least = figures["floor"]
    out.append(
        f"floor (numpy, least arithmetic of {least['measure']}, no gaps): "
        f"{least['seconds']:.3f} s; engine / floor = {least['engine_over_floor']:.1f}"
    )
    out.append("")
    out.append(f"{'one day':<18} {'gaps':>5} {'N':>5} {'rows':>5} {'pairs':>9} {'seconds':>8}")
    for line in figures["one_day"]:
        out.append(
            f"{line['measure']:<18} {'yes' if line['gaps'] else 'no':>5} "
            f"{line['instruments']:>5} {line['trailing_days']:>5} "
            f"{line['pairs']:>9} {line['seconds']:>8.3f}  "
            f"{_verdict(line['ok'])} (<{line['target_s']} s)"
        )
    out.append("")
    out.append(f"{'all pairs, own dates':<20} {'gaps':>5} {'N':>4} {'T':>5} {'seconds':>8} "
               f"{'versus':<11} {'seconds':>8} {'ratio':>6}")
    for line in figures["regression"]:
        out.append(
            f"{line['measure']:<20} {'yes' if line['gaps'] else 'no':>5} "
            f"{line['instruments']:>4} {line['days']:>5} {line['seconds']:>8.3f} "
            f"{line['versus']:<11} {line['versus_seconds']:>8.3f} {line['ratio']:>6.2f}  "
            f"{_verdict(line['ok'])} (<={line['target']:.0f}x)"
        )
    memory = figures["memory"]
    out.append("")
    out.append(
        f"streamed pass {memory['measure']} N={memory['instruments']} T={memory['rows']}: "
        f"{memory['seconds']:.2f} s, traced peak {memory['traced_peak_bytes'] / 2**20:.0f} MiB, "
        f"max RSS {memory['max_rss_bytes'] / 2**20:.0f} MiB  "
        f"(<1.5 GB: {_verdict(memory['ok'])})"
    )
    out.append("")
    out.append(f"all targets: {_verdict(figures['all_ok'])}")
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    """Command line: ``--quick`` for small sizes, ``--json`` for machine-readable output."""
    parser = argparse.ArgumentParser(description="Benchmark the correlation engine.")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--quick", action="store_true", help="small sizes, for a smoke test")
    args = parser.parse_args(argv)
    run(json_out=args.json, quick=args.quick)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
