"""`comove bench backfill`: three rules over every pair of 500 instruments for ten years.

End to end on a SQLite store: write a long CSV of seeded closes (500 instruments x 2,520
business days), ingest it, then evaluate three rules over all 124,750 pairs on every day.
Targets (issue 4, on a 2-core machine): under 60 s end to end, peak memory under 2 GB.
The work runs in a child process so its peak resident memory is its own.

``--gaps``: the same on five markets' calendars (the days are the union of their sessions;
each instrument has no close on its own market's closed days, and 0.5 % of closes are
missing at random; :func:`monitor.bench.engine_speed.market_days`).
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

TIME_TARGET_S = 60.0
MEMORY_TARGET_MB = 2048.0

RULES = """
[[rules]]
name = "crowding"
kind = "level"
measure = "rolling:63"
all = true
above = 0.8
clear = 0.7
hold = 2

[[rules]]
name = "regime"
kind = "shift"
measure = "rolling:21"
baseline = "rolling:126"
all = true
z = 4.0

[[rules]]
name = "swing"
kind = "jump"
measure = "rolling:63"
all = true
delta = 0.3
over_days = 5
"""


def _closes(n_instruments: int, n_days: int, seed: int) -> pd.DataFrame:
    # A one-factor model with loadings spread over (0.1, 0.9): pairwise correlations
    # from about 0 to 0.8, so the level rule sees a few breaches, not a flood.
    rng = np.random.default_rng(seed)
    loadings = rng.uniform(0.1, 0.9, n_instruments)
    market = rng.normal(0, 1, (n_days, 1))
    noise = rng.normal(0, 1, (n_days, n_instruments))
    shocks = market * loadings + noise * np.sqrt(1 - loadings**2)
    closes = 100 * np.exp(np.cumsum(0.01 * shocks, axis=0))
    dates = pd.bdate_range("2015-01-02", periods=n_days, name="date")
    return pd.DataFrame(closes.round(6), index=dates,
                        columns=[f"SYN{i:04d}" for i in range(n_instruments)])


def _peak_resident_kb() -> int:
    """This process's own peak resident memory (VmHWM); ru_maxrss can carry a parent's
    high-water mark over into a child on Linux."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def _child(folder: Path, n_instruments: int, n_days: int, gaps: bool) -> dict[str, object]:
    from monitor.config import load_settings
    from monitor.pipeline import evaluate_range, ingest_file, init_store

    started = time.perf_counter()
    closes = _closes(n_instruments, n_days, seed=11)
    if gaps:
        from monitor.bench.engine_speed import market_days

        dates, missing = market_days(n_days, n_instruments, seed=11)
        closes.index = dates.rename("date")
        closes = closes.mask(missing)
    csv = folder / "closes.csv"
    closes.to_csv(csv, date_format="%Y-%m-%d")
    generated = time.perf_counter()
    (folder / "comove.toml").write_text(
        '[store]\nurl = "sqlite:///bench.sqlite"\n[sources]\nallow_new_symbols = true\n' + RULES)
    settings = load_settings(folder / "comove.toml")
    store = init_store(settings)
    ingest_file(store, settings, csv, today=pd.Timestamp("2100-01-01").date())
    ingested = time.perf_counter()
    report = evaluate_range(store, settings, None, None, commit_seconds=5.0,
                            commit_days=250)
    evaluated = time.perf_counter()
    store.dispose()
    peak_kb = _peak_resident_kb()
    return {
        "instruments": n_instruments, "days": n_days, "gaps": gaps,
        "missing_share": round(float(closes.isna().to_numpy().mean()), 4),
        "pairs": n_instruments * (n_instruments - 1) // 2, "rules": 3,
        "generate_seconds": round(generated - started, 2),
        "ingest_seconds": round(ingested - generated, 2),
        "evaluate_seconds": round(evaluated - ingested, 2),
        "total_seconds": round(evaluated - started, 2),
        "peak_memory_mb": round(peak_kb / 1024, 1),
        "alerts_opened": report.opened, "alerts_cleared": report.cleared,
        "reminders": report.reminders,
    }


def run(*, quick: bool = False, gaps: bool = False) -> dict[str, object]:
    n_instruments, n_days = (40, 300) if quick else (500, 2520)
    with tempfile.TemporaryDirectory(prefix="comove-bench-") as tmp:
        out = subprocess.run(
            [sys.executable, "-m", "monitor.bench.backfill_speed", "--child", tmp,
             str(n_instruments), str(n_days), "gaps" if gaps else "clean"],
            capture_output=True, text=True, check=False)
        if out.returncode != 0:
            raise RuntimeError(f"benchmark child failed: {out.stderr[-2000:]}")
        result: dict[str, object] = json.loads(out.stdout.strip().splitlines()[-1])
    result["time_target_seconds"] = TIME_TARGET_S
    result["memory_target_mb"] = MEMORY_TARGET_MB
    result["time_ok"] = float(result["total_seconds"]) < TIME_TARGET_S  # type: ignore[arg-type]
    result["memory_ok"] = float(result["peak_memory_mb"]) < MEMORY_TARGET_MB  # type: ignore[arg-type]
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="comove bench backfill", description=__doc__)
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--quick", action="store_true", help="small sizes, for a smoke test")
    parser.add_argument(
        "--gaps", action="store_true", help="instruments on five markets' calendars, with gaps")
    parser.add_argument("--child", nargs=4, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        folder, n, t, kind = args.child
        print(json.dumps(_child(Path(folder), int(n), int(t), kind == "gaps")))
        return 0
    result = run(quick=args.quick, gaps=args.gaps)
    if args.json:
        print(json.dumps(result, indent=1))
        return 0
    print(f"backfill bench: {result['instruments']} instruments, {result['pairs']:,} pairs, "
          f"{result['days']} days, {result['rules']} rules over all pairs, SQLite"
          + (f", {result['missing_share']:.1%} of closes missing (five markets)"
             if result["gaps"] else ""))
    for key in ("generate", "ingest", "evaluate", "total"):
        print(f"  {key + ' seconds':<20}{result[f'{key}_seconds']:>10}")
    time_ok = "ok" if result["time_ok"] else "OVER TARGET"
    mem_ok = "ok" if result["memory_ok"] else "OVER TARGET"
    print(f"  end to end {result['total_seconds']} s (target < {TIME_TARGET_S:.0f} s): {time_ok}")
    print(f"  peak memory {result['peak_memory_mb']} MB (target < {MEMORY_TARGET_MB:.0f} MB): "
          f"{mem_ok}")
    print(f"  alerts opened {result['alerts_opened']}, cleared {result['alerts_cleared']}, "
          f"reminders {result['reminders']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
