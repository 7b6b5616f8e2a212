"""`comove demo`: a fictional desk, four years of synthetic closes, the real pipeline.

Everything runs through the normal path: the closes are written as CSV files into the
scenario's inbox and collected like a feed's files, the rules are evaluated by a backfill,
the latest digest is rendered (and sent only when SMTP is configured) and the history
pages are built. A rerun is idempotent: the files are already processed, the evaluation is
current, and the digest and pages are rendered again from the same store.
"""

from __future__ import annotations

import datetime as dt
import logging
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from monitor.config import load_settings
from monitor.demo.scenario import demo_scenario
from monitor.demo.synthetic import generate
from monitor.pipeline import (
    DigestOutcome,
    EvaluationReport,
    backfill,
    build_pages,
    collect_inbox,
    init_store,
    pages_folder,
    render_digest_files,
)
from monitor.templating import config_dir

DEMO_START = dt.date(2022, 12, 1)
DEMO_END = dt.date(2026, 11, 27)
DEMO_SEED = 7
CONFIG_NAME = "comove.demo.toml"
ARCHIVE_DAYS = 10


@dataclass
class DemoReport:
    folder: Path
    settings_file: Path
    store_url: str
    files_written: int
    files_ingested: int
    evaluation: EvaluationReport
    digest: DigestOutcome
    pages_index: Path
    seconds: float


def write_closes(inbox: Path, closes: pd.DataFrame) -> list[Path]:
    """One long-layout CSV per calendar year, skipping files the inbox already processed."""
    inbox.mkdir(parents=True, exist_ok=True)
    processed = inbox / "processed"
    written = []
    long = closes.stack().dropna().rename("close").reset_index()
    long.columns = ["date", "symbol", "close"]
    long["close"] = long["close"].round(6)
    for year, part in long.groupby(long["date"].dt.year):
        name = f"closes-{year}.csv"
        if (processed / name).exists():
            continue
        path = inbox / name
        part.assign(date=part["date"].dt.strftime("%Y-%m-%d")).to_csv(path, index=False)
        written.append(path)
    return written


def run_demo(folder: Path) -> DemoReport:
    """Build the demo desk in `folder`; progress goes to the \"comove.demo\" logger."""
    log = logging.getLogger("comove.demo").info
    started = time.monotonic()
    folder.mkdir(parents=True, exist_ok=True)
    settings_file = folder / "comove.toml"
    shutil.copyfile(config_dir() / CONFIG_NAME, settings_file)
    settings = load_settings(settings_file)
    store = init_store(settings)
    scenario = demo_scenario(DEMO_START, DEMO_END, seed=DEMO_SEED)
    closes = generate(scenario).closes
    written = write_closes(settings.inbox, closes)
    log(f"closes: {closes.shape[1]} instruments, {closes.shape[0]} business days "
        f"({DEMO_START} to {DEMO_END}); {len(written)} CSV file(s) written to {settings.inbox}")
    collected = collect_inbox(store, settings)
    for report in collected.accepted:
        log(f"  ingested {Path(report.file).name}: {report.closes_new} new closes")
        for row in report.suspects.itertuples():
            log(f"  suspect tick {row.symbol} on {row.date.date()}: {row.close:g} after "
                f"{row.previous_close:g} (kept, flagged)")
    for path, reason in collected.rejected:
        log(f"  rejected {path.name}: {reason}")
    evaluation = backfill(store, settings, None, None)
    log(f"backfill: {evaluation.days_written} business days evaluated; "
        f"{evaluation.opened} alerts opened, {evaluation.cleared} cleared")
    # The latest digest, and the ones before it in the archive so the pages link a few
    # evenings (the evening each hedge alert opened among them).
    days = [d.date() for d in closes.index[-ARCHIVE_DAYS:]]
    for day in days[:-1]:
        render_digest_files(store, settings, day)
    digest = render_digest_files(store, settings, DEMO_END)
    log(f"digests: {len(days)} evenings rendered to {digest.folder.parent} "
        "(nothing is sent: the demo has no SMTP settings)")
    pages = pages_folder(settings)
    build_pages(store, settings, pages)
    store.dispose()
    log("planted episodes (what the alerts should show):")
    for episode in scenario.episodes:
        log(f"  {episode.start} to {episode.end}  {episode.kind}: {episode.description}")
    return DemoReport(folder=folder, settings_file=settings_file, store_url=settings.store_url,
                      files_written=len(written), files_ingested=len(collected.accepted),
                      evaluation=evaluation, digest=digest, pages_index=pages / "index.html",
                      seconds=time.monotonic() - started)
