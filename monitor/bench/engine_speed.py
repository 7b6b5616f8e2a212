"""Benchmark of the correlation engine: speed against pandas, the daily run, memory.

Prints, side by side on the same seeded returns (a fictional desk of N instruments driven
by three factors):

* ``rolling:63`` and ``ewma:hl=21,min=1`` over N = 200 instruments and T = 2,520 days: engine
  time, pandas time (``df.rolling(63).corr()``, ``df.ewm(halflife=21).corr()``), their
  ratio (target >= 30) and the largest difference (target <= 1e-10) on gap-free returns;
  then, for information (no target), the same with staggered listings and scattered
  missing days, which send most pairs through the slower pairwise-complete path;
* the daily run for N = 2,000 instruments (about 2 M pairs) from 252 trailing days
  (target < 1 s per measure);
* a full streamed pass for N = 500, T = 2,520 (``rolling:63``) in a fresh subprocess:
  peak traced memory (tracemalloc) and the subprocess's own peak resident set (``VmHWM``;
  ``ru_maxrss`` where /proc is missing) (target < 1.5 GB).

Times are wall-clock (best of a few runs for the engine; pandas once, it is slow); CPU
times are printed too, because the machine may be shared. ``--quick`` shrinks every size
for a smoke test; ``--json`` prints the figures as JSON.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from collections.abc import Callable
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from monitor._typing import Returns2D
from monitor.engine import one_day, stream

RATIO_TARGET = 30.0
DIFFERENCE_TARGET = 1e-10
ONE_DAY_TARGET_S = 1.0
MEMORY_TARGET_BYTES = 1.5 * 2**30


def desk_returns(rows: int, columns: int, *, gaps: bool, seed: int = 20260101) -> Returns2D:
    """Seeded daily returns of a fictional desk: three factors plus noise, ~1 % a day.

    With ``gaps``: a fifth of the instruments list at staggered dates in the first half,
    and 0.5 % of the remaining instrument-days are missing.
    """
    rng = np.random.default_rng(seed)
    loadings = rng.uniform(-0.6, 0.9, size=(3, columns))
    factors = rng.standard_normal((rows, 3))
    returns = 0.01 * (factors @ loadings + rng.standard_normal((rows, columns)))
    returns[0] = np.nan  # no return on the first day
    if gaps:
        late = rng.choice(columns, size=columns // 5, replace=False)
        for column in late:
            returns[: rng.integers(1, rows // 2), column] = np.nan
        holes = rng.random((rows, columns)) < 0.005
        returns[holes] = np.nan
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


def _pandas(returns: Returns2D, spec: str) -> np.ndarray:
    frame = pd.DataFrame(returns)
    with np.errstate(divide="ignore", invalid="ignore"):
        if spec.startswith("rolling"):
            window = int(spec.split(":")[1])
            result = frame.rolling(window).corr()
        else:
            half_life = float(spec.split("hl=")[1].split(",")[0])
            result = frame.ewm(halflife=half_life).corr()
    rows, columns = returns.shape
    return result.to_numpy().reshape(rows, columns, columns)


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


def versus_pandas(columns: int, rows: int, *, gaps: bool, repeat: int) -> list[dict[str, Any]]:
    returns = desk_returns(rows, columns, gaps=gaps)
    lines = []
    # min=1: pandas' ewm() reports from a pair's second common day on, and so does this spec
    for spec in ("rolling:63", "ewma:hl=21,min=1"):
        engine_wall, engine_cpu, _ = _timed(partial(_drain, returns, spec), repeat)
        pandas_wall, pandas_cpu, expected = _timed(partial(_pandas, returns, spec), 1)
        worst, mismatched = _compare(returns, spec, expected)
        del expected
        ratio = pandas_wall / engine_wall
        lines.append(
            {
                "measure": spec,
                "instruments": columns,
                "days": rows,
                "gaps": gaps,
                "engine_s": engine_wall,
                "engine_cpu_s": engine_cpu,
                "pandas_s": pandas_wall,
                "pandas_cpu_s": pandas_cpu,
                "ratio": ratio,
                "ratio_cpu": pandas_cpu / engine_cpu if engine_cpu > 0 else float("inf"),
                "max_abs_difference": worst,
                "cells_defined_in_one_only": mismatched,
                # the targets are set for the gap-free case; the gappy rows are for information
                "target_applies": not gaps,
                "ratio_ok": ratio >= RATIO_TARGET,
                "difference_ok": worst <= DIFFERENCE_TARGET and mismatched == 0,
            }
        )
    return lines


def daily_run(columns: int, rows: int, repeat: int) -> list[dict[str, Any]]:
    returns = desk_returns(rows, columns, gaps=False)
    lines = []
    for spec in ("rolling:63", "rolling:252", "ewma:hl=21"):
        wall, cpu, day = _timed(partial(one_day, returns, spec), repeat)
        lines.append(
            {
                "measure": spec,
                "instruments": columns,
                "trailing_days": rows,
                "pairs": columns * (columns - 1) // 2,
                "seconds": wall,
                "cpu_seconds": cpu,
                "defined": int(np.count_nonzero(np.isfinite(day.value))),
                "ok": wall < ONE_DAY_TARGET_S,
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
    figures: dict[str, Any] = {
        "quick": quick,
        "machine": {"cpus": os.cpu_count(), "load_average": list(os.getloadavg())},
        "versus_pandas": versus,
        "one_day": daily,
        "memory": memory,
    }
    figures["all_ok"] = bool(
        all(line["ratio_ok"] and line["difference_ok"] for line in versus if line["target_applies"])
        and all(line["ok"] for line in daily)
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
        f"{'measure':<16} {'N':>5} {'T':>5} {'gaps':>5} {'engine s':>9} {'pandas s':>9} "
        f"{'ratio':>7} {'cpu ratio':>9} {'max |diff|':>11}  ratio>=30  diff<=1e-10"
    )
    note = {True: "", False: "  (information)"}
    for line in figures["versus_pandas"]:
        out.append(
            f"{line['measure']:<16} {line['instruments']:>5} {line['days']:>5} "
            f"{'yes' if line['gaps'] else 'no':>5} {line['engine_s']:>9.3f} "
            f"{line['pandas_s']:>9.2f} {line['ratio']:>7.1f} {line['ratio_cpu']:>9.1f} "
            f"{line['max_abs_difference']:>11.2e}  {_verdict(line['ratio_ok']):>9}  "
            f"{_verdict(line['difference_ok']):>11}{note[line['target_applies']]}"
        )
    out.append("")
    out.append(f"{'one day':<12} {'N':>5} {'rows':>5} {'pairs':>9} {'seconds':>8}  <1 s")
    for line in figures["one_day"]:
        out.append(
            f"{line['measure']:<12} {line['instruments']:>5} {line['trailing_days']:>5} "
            f"{line['pairs']:>9} {line['seconds']:>8.3f}  {_verdict(line['ok'])}"
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
