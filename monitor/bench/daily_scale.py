"""`comove bench scale`: the evening's digest and pages of a 3,000-instrument desk.

A seeded synthetic desk (fictional instruments SYN0000 ..., 30 blocks of 100 whose members
move together, so one `all = true` level rule over the 4.5 million pairs opens thousands
of alerts) is written as a long CSV, ingested into a SQLite store and evaluated over its
last `--evaluated` days (the replay runs from the first day; only those days' alerts are
written). That store is the setup: it is kept in `--store DIR` and reused by the next run,
since it takes many minutes at full size. Then each measured step runs in a child process
of its own, so its peak resident memory (VmHWM, as `resource.getrusage` would report) is
its own:

- digest: `render_digest_files` for the last day (context from the store, charts, the
  email kept under `[digest] max_email_bytes`);
- pages: `build_pages` into an empty folder, then again over it (the incremental build).

Targets (issue 17, on the 2-core CI machine): digest under 60 s and 1 GB, email under
2 MB, pages under 5 minutes. Timings are never asserted by the tests (they run `--quick`).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from monitor.bench.backfill_speed import _peak_resident_kb

DIGEST_SECONDS = 60.0
DIGEST_MB = 1024.0
EMAIL_BYTES = 2_000_000
PAGES_SECONDS = 300.0

FULL = (3000, 500, 20)
"""Instruments, days, evaluated days of the full size."""
QUICK = (60, 160, 10)

RULE = """
[[rules]]
name = "crowding"
kind = "level"
measure = "rolling:63"
all = true
above = 0.8
"""


def _closes(n_instruments: int, n_days: int, seed: int = 5) -> pd.DataFrame:
    # A market factor (loading 0.3) and one factor per block of 100 instruments with
    # loadings in (0.55, 0.95): pairs within a block sit around 0.4 to 0.9, so a level
    # of 0.8 is crossed by a few percent of them on a day (a flood), the rest never.
    rng = np.random.default_rng(seed)
    blocks = max(1, n_instruments // 100)
    block = np.arange(n_instruments) % blocks
    loading = rng.uniform(0.55, 0.95, n_instruments)
    market = rng.normal(0, 1, (n_days, 1))
    factors = rng.normal(0, 1, (n_days, blocks))
    noise = rng.normal(0, 1, (n_days, n_instruments))
    own = np.sqrt(np.clip(1 - loading**2 - 0.09, 0.01, None))
    shocks = 0.3 * market + loading * factors[:, block] + own * noise
    closes = 100 * np.exp(np.cumsum(0.01 * shocks, axis=0))
    dates = pd.bdate_range("2024-01-02", periods=n_days, name="date")
    return pd.DataFrame(closes.round(6), index=dates,
                        columns=[f"SYN{i:04d}" for i in range(n_instruments)])


def _settings_text() -> str:
    return ('[store]\nurl = "sqlite:///bench.sqlite"\n[sources]\nallow_new_symbols = true\n'
            + RULE)


def _setup(folder: Path, n_instruments: int, n_days: int, evaluated: int) -> dict[str, Any]:
    from monitor.config import load_settings
    from monitor.pipeline import evaluate_range, ingest_file, init_store

    started = time.perf_counter()
    closes = _closes(n_instruments, n_days)
    csv = folder / "closes.csv"
    closes.to_csv(csv, date_format="%Y-%m-%d")
    (folder / "comove.toml").write_text(_settings_text())
    settings = load_settings(folder / "comove.toml")
    store = init_store(settings)
    ingest_file(store, settings, csv, today=dt.date(2100, 1, 1))
    ingested = time.perf_counter()
    report = evaluate_range(store, settings, closes.index[-evaluated].date(), None,
                            commit_seconds=30.0, commit_days=250)
    store.dispose()
    (folder / "bench.json").write_text(json.dumps(
        {"instruments": n_instruments, "days": n_days, "evaluated": evaluated}))
    return {"setup_ingest_seconds": round(ingested - started, 1),
            "setup_evaluate_seconds": round(time.perf_counter() - ingested, 1),
            "alerts_opened": report.opened, "setup_peak_mb": round(_peak_resident_kb() / 1024)}


def _digest(folder: Path) -> dict[str, Any]:
    from monitor.config import load_settings
    from monitor.pipeline import latest_close_date, open_settings_store, render_digest_files

    settings = load_settings(folder / "comove.toml")
    store = open_settings_store(settings)
    as_of = latest_close_date(store)
    started = time.perf_counter()
    outcome = render_digest_files(store, settings, as_of, out_dir=folder / "digest-out",
                                  now=dt.datetime(2100, 1, 1, tzinfo=dt.UTC))
    seconds = time.perf_counter() - started
    raw = outcome.paths.eml.read_bytes()
    from email import message_from_bytes
    from email.policy import default

    images = sum(1 for part in message_from_bytes(raw, policy=default).walk()
                 if part.get_content_type() == "image/png")
    return {"digest_seconds": round(seconds, 1),
            "digest_peak_mb": round(_peak_resident_kb() / 1024),
            "email_bytes": len(raw), "email_charts": images, "subject": outcome.subject}


def _pages(folder: Path) -> dict[str, Any]:
    import shutil

    from monitor.config import load_settings
    from monitor.pipeline import build_pages, open_settings_store

    settings = load_settings(folder / "comove.toml")
    store = open_settings_store(settings)
    out = folder / "pages-out"
    shutil.rmtree(out, ignore_errors=True)
    started = time.perf_counter()
    first = build_pages(store, settings, out)
    built = time.perf_counter()
    second = build_pages(store, settings, out)
    rebuilt = time.perf_counter()
    size = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
    return {"pages_seconds": round(built - started, 1),
            "pages_rebuild_seconds": round(rebuilt - built, 1),
            "pages_peak_mb": round(_peak_resident_kb() / 1024),
            "pages_files": len(first.files), "pages_charts_drawn": first.charts_drawn,
            "rebuild_charts_drawn": second.charts_drawn, "rebuild_written": second.written,
            "site_mb": round(size / 1e6, 1)}


STEPS: dict[str, Callable[..., dict[str, Any]]] = {
    "setup": _setup, "digest": _digest, "pages": _pages}


def _child(step: str, folder: Path, *sizes: int) -> dict[str, Any]:
    out = subprocess.run(
        [sys.executable, "-m", "monitor.bench.daily_scale", "--child", step, str(folder),
         *(str(s) for s in sizes)], capture_output=True, text=True, check=False)
    if out.returncode != 0:
        raise RuntimeError(f"benchmark step {step} failed: {out.stderr[-3000:]}")
    result: dict[str, Any] = json.loads(out.stdout.strip().splitlines()[-1])
    return result


def run(*, quick: bool = False, store: Path | None = None) -> dict[str, Any]:
    """Set up (or reuse) the store, then measure the digest and the pages."""
    n, t, evaluated = QUICK if quick else FULL
    with tempfile.TemporaryDirectory(prefix="comove-bench-scale-") as tmp:
        folder = Path(store) if store is not None else Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        figures: dict[str, Any] = {"instruments": n, "days": t, "evaluated": evaluated,
                                   "pairs": n * (n - 1) // 2}
        recorded = folder / "bench.json"
        if recorded.is_file() and (folder / "bench.sqlite").is_file():
            kept = json.loads(recorded.read_text())
            figures.update(kept)
            figures["pairs"] = kept["instruments"] * (kept["instruments"] - 1) // 2
            figures["setup"] = "reused"
        else:
            figures.update(_child("setup", folder, n, t, evaluated))
            figures["setup"] = "built"
        figures.update(_child("digest", folder))
        figures.update(_child("pages", folder))
    figures["digest_ok"] = (figures["digest_seconds"] < DIGEST_SECONDS
                            and figures["digest_peak_mb"] < DIGEST_MB)
    figures["email_ok"] = figures["email_bytes"] < EMAIL_BYTES
    figures["pages_ok"] = figures["pages_seconds"] < PAGES_SECONDS
    return figures


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="comove bench scale", description=__doc__)
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--quick", action="store_true", help="small sizes, for a smoke test")
    parser.add_argument("--store", type=Path, metavar="DIR",
                        help="keep the set-up store here and reuse it on the next run")
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        step, folder, *sizes = args.child
        print(json.dumps(STEPS[step](Path(folder), *(int(s) for s in sizes))))
        return 0
    f = run(quick=args.quick, store=args.store)
    if args.json:
        print(json.dumps(f, indent=1))
        return 0
    ok = {True: "ok", False: "OVER TARGET"}
    print(f"scale bench: {f['instruments']:,} instruments, {f['pairs']:,} pairs, {f['days']} "
          f"days, one level rule over all pairs (alerts written for the last "
          f"{f['evaluated']} days), SQLite; store {f['setup']}")
    if f["setup"] == "built":
        print(f"  setup: ingest {f['setup_ingest_seconds']} s, evaluate "
              f"{f['setup_evaluate_seconds']} s, peak {f['setup_peak_mb']} MB")
    print(f"  digest  {f['digest_seconds']:>7} s  peak {f['digest_peak_mb']:>5} MB  "
          f"(targets {DIGEST_SECONDS:.0f} s, {DIGEST_MB:.0f} MB): {ok[f['digest_ok']]}")
    print(f"  email   {f['email_bytes']:>9,} bytes, {f['email_charts']} charts "
          f"(target < {EMAIL_BYTES:,}): {ok[f['email_ok']]}")
    print(f"  pages   {f['pages_seconds']:>7} s  peak {f['pages_peak_mb']:>5} MB  "
          f"{f['pages_files']:,} files, {f['pages_charts_drawn']:,} charts "
          f"(target {PAGES_SECONDS:.0f} s): {ok[f['pages_ok']]}")
    print(f"  pages rebuild {f['pages_rebuild_seconds']} s ({f['rebuild_charts_drawn']} "
          f"charts drawn, {f['rebuild_written']} files written), site {f['site_mb']} MB")
    print(f"  subject: {f['subject']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
