"""`comove bench ingest`: a long CSV of 500 instruments x 2,520 days into SQLite, and back.

Targets (issue 2, on a 2-core machine): ingest under 30 s, the full panel read back under 3 s.
The figures are measured on each run, never assumed.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.config import parse_settings
from monitor.pipeline import ingest_file, init_store, read_closes

INGEST_TARGET_S = 30.0
READ_TARGET_S = 3.0


def _write_csv(path: Path, n_instruments: int, n_days: int, seed: int) -> int:
    rng = np.random.default_rng(seed)
    dates = pd.bdate_range("2014-01-01", periods=n_days).strftime("%Y-%m-%d")
    symbols = [f"SYN{i:04d}" for i in range(n_instruments)]
    closes = 100 * np.exp(np.cumsum(rng.normal(0, 0.01, size=(n_days, n_instruments)), axis=0))
    frame = pd.DataFrame({
        "date": np.tile(np.asarray(dates), n_instruments),
        "symbol": np.repeat(symbols, n_days),
        "close": closes.T.reshape(-1).round(6),
    })
    frame.to_csv(path, index=False)
    return len(frame)


def run(*, quick: bool = False, seed: int = 3) -> dict[str, object]:
    n_instruments, n_days = (50, 252) if quick else (500, 2520)
    with tempfile.TemporaryDirectory(prefix="comove-bench-") as tmp:
        folder = Path(tmp)
        csv = folder / "closes.csv"
        rows = _write_csv(csv, n_instruments, n_days, seed)
        settings = parse_settings(
            {"store": {"url": "sqlite:///bench.sqlite"}, "sources": {"allow_new_symbols": True}},
            base_dir=folder,
        )
        store = init_store(settings)
        started = time.perf_counter()
        report = ingest_file(store, settings, csv, today=pd.Timestamp("2100-01-01").date())
        ingest_s = time.perf_counter() - started
        started = time.perf_counter()
        panel = read_closes(store)
        read_s = time.perf_counter() - started
        store.dispose()
    return {
        "instruments": n_instruments, "days": n_days, "rows": rows,
        "closes_written": report.closes_new, "panel_shape": list(panel.shape),
        "ingest_seconds": round(ingest_s, 2), "ingest_target_seconds": INGEST_TARGET_S,
        "ingest_ok": ingest_s < INGEST_TARGET_S,
        "read_seconds": round(read_s, 2), "read_target_seconds": READ_TARGET_S,
        "read_ok": read_s < READ_TARGET_S,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="comove bench ingest", description=__doc__)
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--quick", action="store_true", help="small sizes, for a smoke test")
    args = parser.parse_args(argv)
    result = run(quick=args.quick)
    if args.json:
        print(json.dumps(result, indent=1))
        return 0
    print(f"ingest bench: {result['instruments']} instruments x {result['days']} days "
          f"= {result['rows']:,} rows, SQLite")
    print(f"{'step':<22}{'seconds':>10}{'target':>10}  result")
    for step, key in (("ingest (CSV -> store)", "ingest"), ("read full panel", "read")):
        ok = "ok" if result[f"{key}_ok"] else "OVER TARGET"
        print(f"{step:<22}{result[f'{key}_seconds']:>10}{result[f'{key}_target_seconds']:>10}  "
              f"{ok}")
    return 0
