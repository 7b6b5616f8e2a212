"""The `comove` command: thin shells that load settings, call the pipeline, print results.

Every command is registered with `@command`, so `--help`, the shared `--config` option and
the error handling are written once. Errors are one line on stderr and exit code 1; usage
errors exit 2 (argparse); a traceback is never shown to a user.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import signal
import sys
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from monitor import __version__
from monitor.cli_common import (
    COMMANDS,
    add_format_option,
    command,
    date_argument,
    dumps,
    load,
    print_frame,
)
from monitor.errors import ComoveError, IngestError
from monitor.logs import console_logging
from storage import StoreError

__all__ = ["COMMANDS", "BENCHES", "ProgressLine", "add_format_option", "build_parser",
           "command", "dumps", "load", "main", "print_frame"]

# --- init and check ------------------------------------------------------------------------


def _init_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--example", action="store_true",
                        help="first write a commented settings file (rules and schedule "
                             "included) at the --config path, else ./comove.toml; an "
                             "existing file is never overwritten")


@command("init", "Create the store (idempotent) or upgrade an older one in place, and "
         "record the configured instruments.", _init_args)
def _init(args: argparse.Namespace) -> int:
    from monitor.pipeline import init_store

    if args.example:
        _write_example(getattr(args, "config", None))
    settings = load(args)
    store = init_store(settings)
    print(f"store ready: {store.url}")
    print(f"inbox: {settings.inbox}")
    print(f"instruments configured: {len(settings.instruments)}")
    return 0


def _write_example(explicit: str | None) -> None:
    from monitor.config import find_settings_file
    from monitor.templating import config_dir

    target = find_settings_file(explicit)
    if target.exists():
        raise ComoveError(f"{target} already exists; --example never overwrites a settings "
                          "file (remove it or give another --config PATH)")
    target.parent.mkdir(parents=True, exist_ok=True)
    text = (config_dir() / "comove.example.toml").read_text(encoding="utf-8")
    with open(target, "x", encoding="utf-8") as out:  # "x": never over a file made meanwhile
        out.write(text)
    print(f"example settings written to {target}: edit the desk, instruments and rules")


@command("check", "Check the whole settings file (rules and schedule included): print the "
         "resolved settings and every problem at once; exit 1 when there is any.")
def _check(args: argparse.Namespace) -> int:
    from monitor.config import inspect_settings
    from monitor.settings_report import describe_check

    checked = inspect_settings(getattr(args, "config", None))
    for line in describe_check(checked):
        print(line)
    return 1 if checked.problems else 0


# --- ingest -----------------------------------------------------------------------------


def _ingest_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("files", nargs="+", type=Path, metavar="FILE",
                        help="closes files (.csv or .csv.gz); each is ingested on its own; "
                             "- reads one file from standard input")
    parser.add_argument("--format", choices=("auto", "long", "wide"), default="auto",
                        help="layout: long = date,symbol,close[,source]; wide = date plus one "
                             "column per symbol; auto decides from the header (default)")
    parser.add_argument("--skip-bad", action="store_true",
                        help="write the good rows and record the rejects, instead of "
                             "refusing the whole file")


@command("ingest", "Load closes from CSV files (.csv or .csv.gz), long or wide layout.",
         _ingest_args)
def _ingest(args: argparse.Namespace) -> int:
    from monitor.pipeline import ingest_file, open_settings_store

    settings = load(args)
    if sum(str(p) == "-" for p in args.files) > 1:
        raise ComoveError("ingest: standard input (-) can be named only once")
    store = open_settings_store(settings)
    failed = 0
    try:
        for path in args.files:
            data = sys.stdin.buffer.read() if str(path) == "-" else None
            try:
                report = ingest_file(store, settings,
                                     Path("stdin") if data is not None else path,
                                     layout=args.format, skip_bad=args.skip_bad, data=data)
            except IngestError as exc:
                for problem in _first(exc.problems):
                    print(problem, file=sys.stderr)
                print(f"Error: {exc}", file=sys.stderr)
                failed += 1
                continue
            _print_ingest(report)
    finally:
        store.dispose()
    return 1 if failed else 0


PROBLEMS_SHOWN = 20
"""Problems printed per file; the rest are counted (the batch keeps the first 200)."""


def _first(problems: list[str], prefix: str = "") -> list[str]:
    shown = [f"{prefix}{p}" for p in problems[:PROBLEMS_SHOWN]]
    if len(problems) > PROBLEMS_SHOWN:
        shown.append(f"{prefix}... and {len(problems) - PROBLEMS_SHOWN} more problem(s)")
    return shown


def _print_ingest(report: Any) -> None:
    name = Path(report.file).name
    for note in _first(report.notes, "  no close: "):
        print(note, file=sys.stderr)
    if report.already_ingested:
        seen = f" (as batch {report.batch_id})" if report.batch_id is not None else ""
        print(f"{name}: every close is already in the store{seen}; nothing to do")
        return
    print(
        f"{name}: batch {report.batch_id}: {report.rows_read} rows read, "
        f"{report.closes_new} new closes, {report.closes_restated} restated, "
        f"{report.closes_unchanged} unchanged, {report.rows_rejected} rejected"
    )
    for problem in _first(report.problems, "  skipped: "):
        print(problem, file=sys.stderr)
    for row in report.restatements.itertuples():
        print(f"  restated: {row.symbol} on {row.date.date()}: {row.old_close:g} -> "
              f"{row.new_close:g}")
    if report.earliest_restated:
        print(f"  earliest restated date: {report.earliest_restated} (later evaluations "
              "recompute from it)")
    for row in report.suspects.itertuples():
        print(f"  suspect tick: {row.symbol} on {row.date.date()}: close {row.close:g} after "
              f"{row.previous_close:g} (log return {row.log_return:+.3f}); accepted, please check")


# --- instruments ------------------------------------------------------------------------


def _instruments_args(parser: argparse.ArgumentParser) -> None:
    add_format_option(parser)


@command("instruments", "List instruments with first and last date, closes and gaps.",
         _instruments_args)
def _instruments(args: argparse.Namespace) -> int:
    from monitor.pipeline import instrument_summary, open_settings_store

    store = open_settings_store(load(args))
    print_frame(instrument_summary(store), args.format)
    return 0


# --- backfill ---------------------------------------------------------------------------


def _backfill_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--start", type=date_argument, metavar="DATE",
                        help="first business day to evaluate (default: the first with returns)")
    parser.add_argument("--end", type=date_argument, metavar="DATE",
                        help="last business day to evaluate (default: the last with closes)")
    parser.add_argument("--rule", action="append", metavar="NAME",
                        help="evaluate only this rule (repeatable)")
    parser.add_argument("--force", action="store_true",
                        help="replay from the first day even when the saved state is current")
    parser.add_argument("--no-pages", action="store_true",
                        help="do not rebuild the history pages afterwards")


@contextmanager
def stop_on_interrupt() -> Iterator[threading.Event]:
    """A first Ctrl-C asks the work to stop at its next safe point (after committing what
    it has); a second one stops at once."""
    requested = threading.Event()

    def handler(signum: int, frame: object) -> None:
        if requested.is_set():
            raise KeyboardInterrupt
        requested.set()
        print("\nstopping after the days evaluated so far are committed "
              "(Ctrl-C again stops at once)", file=sys.stderr, flush=True)

    previous = signal.signal(signal.SIGINT, handler)
    try:
        yield requested
    finally:
        signal.signal(signal.SIGINT, previous)


class ProgressLine:
    """Days done, rate and ETA: a redrawn bar on a terminal, plain lines otherwise."""

    def __init__(self, stream: Any = None) -> None:
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.started = time.monotonic()
        self.last_plain = -1.0

    def __call__(self, done: int, total: int, day: dt.date) -> None:
        elapsed = max(time.monotonic() - self.started, 1e-9)
        rate = done / elapsed
        eta = (total - done) / rate if rate > 0 else float("nan")
        share = done / total if total else 1.0
        text = f"{done}/{total} days through {day}  {rate:,.0f} days/s  ETA {eta:,.0f} s"
        if self.tty:
            filled = int(share * 30)
            self.stream.write(f"\r[{'#' * filled}{'.' * (30 - filled)}] {text} ")
            if done >= total:
                self.stream.write("\n")
        elif share - self.last_plain >= 0.1 or done >= total:
            self.last_plain = share
            self.stream.write(f"progress: {text}\n")
        self.stream.flush()


@command("backfill", "Evaluate the rules over a past range of business days and store the "
         "alerts (idempotent; an interrupted run resumes).", _backfill_args)
def _backfill(args: argparse.Namespace) -> int:
    from monitor.pipeline import backfill, open_settings_store

    settings = load(args)
    store = open_settings_store(settings)
    # COMOVE_COMMIT_DAYS commits more often (the tests kill a backfill between commits).
    commit_days = int(os.environ.get("COMOVE_COMMIT_DAYS", "60"))
    progress = None if getattr(args, "quiet", False) else ProgressLine()  # -q: no progress
    with stop_on_interrupt() as stop:
        report = backfill(store, settings, args.start, args.end, rule_names=args.rule,
                          progress=progress, force=args.force, commit_days=commit_days,
                          should_stop=stop.is_set)
    if report.already_done:
        print(f"already evaluated through {report.resumed_from} with these rules and closes; "
              "nothing changed (--force replays it)")
        return 0
    resumed = f", resumed after {report.resumed_from}" if report.resumed_from else ""
    print(f"evaluated {report.start} to {report.end}: {report.days_written} days written"
          f"{resumed}; {report.opened} opened, {report.cleared} cleared, "
          f"{report.reminders} reminders (run {report.run_id})")
    if not args.no_pages:
        from monitor.pipeline import build_pages, pages_folder

        folder = pages_folder(settings)
        site = build_pages(store, settings, folder)
        print(f"pages rebuilt in {folder} ({site.written} written, {site.unchanged} unchanged)")
    return 0


# --- alerts, ack, mute, series: monitor/cli_review.py ------------------------------------

from monitor import cli_review  # noqa: E402,F401  (registers its commands here, in order)

# --- digest and the daily run ------------------------------------------------------------


def _digest_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--as-of", type=date_argument, metavar="DATE",
                        help="digest date (default: the latest business day with closes)")
    parser.add_argument("--out", type=Path, metavar="DIR",
                        help="write digest.html with its PNGs, digest.txt and digest.eml here")
    parser.add_argument("--send", action="store_true",
                        help="store the digest in the outbox and send it by email")
    parser.add_argument("--resend", action="store_true",
                        help="with --send: send again even if this date's digest was sent")


@command("digest", "Render the evening digest for a date (HTML, text, charts, .eml) and "
         "optionally send it.", _digest_args)
def _digest(args: argparse.Namespace) -> int:
    from monitor.digest import MailError
    from monitor.pipeline import (
        latest_close_date,
        open_settings_store,
        render_digest_files,
        send_digest,
    )

    settings = load(args)
    store = open_settings_store(settings)
    as_of = args.as_of or latest_close_date(store)
    if not args.send:
        outcome = render_digest_files(store, settings, as_of, out_dir=args.out)
        print(f"{outcome.subject}\n  {outcome.paths.html}\n  {outcome.paths.eml}")
        return 0
    try:
        outcome = send_digest(store, settings, as_of, resend=args.resend)
    except MailError as exc:
        print(f"Error: {exc}; the digest stays in the outbox and the next run retries it",
              file=sys.stderr)
        return 1
    if outcome.status == "already sent":
        print(f"the digest for {as_of} was already sent (outbox {outcome.outbox_id}); "
              "--resend sends it again")
    elif outcome.status == "maybe sent":
        from monitor.scheduler import EXIT_EMAIL

        print(f"Warning: the digest for {as_of} may have been sent (outbox "
              f"{outcome.outbox_id}): {outcome.error}; it is not sent again by itself, "
              "--resend sends it again", file=sys.stderr)
        return EXIT_EMAIL
    else:
        print(f"sent: {outcome.subject} ({outcome.attempts} attempt(s))")
    return 0


def _run_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--once", action="store_true",
                        help="run the daily job now instead of on the schedule; exit "
                             "code 0: done, 3: done with data problems (a file rejected, "
                             "no closes, a critical alert opened), 4: a digest not sent "
                             "or perhaps sent (it stays in the outbox), 1: an error")
    parser.add_argument("--as-of", type=date_argument, metavar="DATE",
                        help="with --once: the as-of date (default: today in the "
                             "schedule's zone)")
    parser.add_argument("--force", action="store_true",
                        help="with --once: rerun a day already done (no duplicate alerts "
                             "or emails)")
    parser.add_argument("--no-catch-up", action="store_true",
                        help="do not run missed business days first")


@command("run", "Run the daily job on its schedule (closes in, rules, digest, pages), or "
         "once with --once.", _run_args)
def _run(args: argparse.Namespace) -> int:
    from monitor.pipeline import open_settings_store
    from monitor.scheduler import run_daily_command

    settings = load(args)
    store = open_settings_store(settings)
    return run_daily_command(store, settings, once=args.once, as_of=args.as_of,
                             force=args.force, catch_up=not args.no_catch_up)


# --- pages -----------------------------------------------------------------------------


def _pages_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("build", "serve"),
                        help="build: write the site; serve: serve it read-only on loopback")
    parser.add_argument("--out", type=Path, metavar="DIR",
                        help="site folder (default: pages/ beside the settings file)")
    parser.add_argument("--host", default="127.0.0.1", help="serve: address (loopback)")
    parser.add_argument("--port", type=int, default=8710, help="serve: port (default 8710)")
    parser.add_argument("--allow-remote", action="store_true",
                        help="serve: allow a non-loopback --host (other machines can read "
                             "the pages)")


@command("pages", "Build the alert history pages, or serve them read-only in a browser.",
         _pages_args)
def _pages(args: argparse.Namespace) -> int:
    from monitor.pipeline import build_pages, open_settings_store, pages_folder

    settings = load(args)
    folder = args.out or pages_folder(settings)
    if args.action == "build":
        report = build_pages(open_settings_store(settings), settings, folder)
        print(f"pages in {folder}: {report.written} written, {report.unchanged} unchanged, "
              f"{report.removed} removed; open {folder / 'index.html'}")
        return 0
    from monitor.pages import make_server, server_url

    if not (folder / "index.html").is_file():
        raise ComoveError(f"no site in {folder}: run `comove pages build` first")
    server = make_server(folder, args.host, args.port, allow_remote=args.allow_remote)
    print(f"serving {folder} at {server_url(server)} (read-only; Ctrl-C stops)", flush=True)
    try:
        server.serve_forever()
    finally:
        server.server_close()
    return 0


# --- demo ------------------------------------------------------------------------------


def _demo_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--out", type=Path, default=Path("comove-demo"), metavar="DIR",
                        help="folder of the demo desk (default: ./comove-demo)")


@command("demo", "Build a fictional desk with four years of synthetic closes and run the "
         "whole pipeline on it.", _demo_args, needs_config=False)
def _demo(args: argparse.Namespace) -> int:
    from monitor.demo.run import run_demo

    report = run_demo(args.out)
    folder = report.folder
    print(f"\ndone in {report.seconds:.0f} s. Open:")
    print(f"  digest   {report.digest.paths.html}")
    print(f"  pages    {report.pages_index}")
    print(f"  store    {report.store_url}")
    print("Next, try:")
    config = folder / "comove.toml"
    print(f"  comove alerts --config {config}")
    print(f"  comove series KLV DUNQ --measure rolling:63 --start 2026-09-01 --config {config}")
    print(f"  comove pages serve --config {config}")
    print("comove is a monitoring aid; these numbers are invented and nothing here is advice.")
    return 0


# --- bench ------------------------------------------------------------------------------

BENCHES = {
    "ingest": "monitor.bench.ingest_speed",
    "engine": "monitor.bench.engine_speed",
    "digest": "monitor.bench.digest_speed",
    "backfill": "monitor.bench.backfill_speed",
    "pages": "monitor.bench.pages_speed",
    "alerts": "monitor.bench.alert_quality",
    "scale": "monitor.bench.daily_scale",
}


def _bench_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("what", choices=sorted(BENCHES), help="which benchmark to run")
    parser.add_argument("rest", nargs=argparse.REMAINDER,
                        help="options for that benchmark (--json, --quick)")


@command("bench", "Measure speed and memory against the targets; prints a table (or --json).",
         _bench_args, needs_config=False)
def _bench(args: argparse.Namespace) -> int:
    import importlib

    module = importlib.import_module(BENCHES[args.what])
    return int(module.main(args.rest))


# --- the parser -------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="comove",
        description="Correlation monitor for a market-risk desk: closes in, rolling and "
                    "EWMA correlations, alerts and an evening digest out. A monitoring aid, "
                    "not investment advice.",
    )
    parser.add_argument("--version", action="version", version=f"comove {__version__}")
    _add_global_options(parser, config=True)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for cmd in COMMANDS.values():
        child = sub.add_parser(cmd.name, help=cmd.help, description=cmd.help)
        _add_global_options(child, config=cmd.needs_config)
        cmd.configure(child)
        child.set_defaults(handler=cmd.handler)
    return parser


def _add_global_options(parser: argparse.ArgumentParser, *, config: bool) -> None:
    """`--config`, `-q` and `-v`, accepted before or after the command: the main parser and
    each command's parser know them, and SUPPRESS keeps a command's parser from overwriting
    a value given before the command."""
    if config:
        parser.add_argument("--config", metavar="PATH", default=argparse.SUPPRESS,
                            help="settings file (default: $COMOVE_CONFIG, else ./comove.toml)")
    parser.add_argument("-q", "--quiet", action="store_true", default=argparse.SUPPRESS,
                        help="print results and warnings only, no progress lines")
    parser.add_argument("-v", "--verbose", action="store_true", default=argparse.SUPPRESS,
                        help="also print debugging detail")


def main(argv: Sequence[str] | None = None) -> int:
    import logging

    parser = build_parser()
    args = parser.parse_args(argv)
    quiet, verbose = getattr(args, "quiet", False), getattr(args, "verbose", False)
    if quiet and verbose:
        parser.error("-q and -v cannot be used together")
    machine = (getattr(args, "format", None) == "json"
               or "--json" in (getattr(args, "rest", None) or ()))
    console_logging(level=logging.WARNING if quiet else logging.DEBUG if verbose
                    else logging.INFO, standard="stderr" if machine else "stdout")
    try:
        return int(args.handler(args))
    except (ComoveError, StoreError) as exc:
        print(f"Error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("Interrupted; every step already committed is kept.", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:
        # A bug, not a user error: still one line, with a way to see the traceback.
        if os.environ.get("COMOVE_DEBUG"):
            raise
        print(f"Error: unexpected {type(exc).__name__}: {exc} (set COMOVE_DEBUG=1 for the "
              "traceback)", file=sys.stderr)
        return 1
