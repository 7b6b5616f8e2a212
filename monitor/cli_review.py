"""`comove alerts`, `ack`, `mute`, `mutes`, `unmute`, `unack` and `series`: reading and
annotating the alert history from the shell (the work is in monitor.pipeline.review)."""

from __future__ import annotations

import argparse

import pandas as pd

from monitor.cli_common import add_format_option, command, date_argument, load, print_frame


def _alerts_args(parser: argparse.ArgumentParser) -> None:
    which = parser.add_mutually_exclusive_group()
    which.add_argument("--open", action="store_true", help="open alerts only (the default)")
    which.add_argument("--all", action="store_true",
                       help="open, cleared and retracted alerts (a rerun no longer produces them)")
    parser.add_argument("--since", type=date_argument, metavar="DATE",
                        help="alerts opened, cleared or still open on or after DATE")
    parser.add_argument("--pair", metavar="A/B", help="alerts of one pair")
    parser.add_argument("--rule", metavar="NAME", help="alerts of one rule")
    add_format_option(parser)


@command("alerts", "List alerts with state, severity, rule, pair, dates, values and who "
         "acknowledged them.", _alerts_args)
def _alerts(args: argparse.Namespace) -> int:
    from monitor.pipeline import list_alerts, open_settings_store

    settings = load(args)
    frame = list_alerts(open_settings_store(settings), settings, open_only=not args.all,
                        since=args.since, pair=args.pair, rule=args.rule)
    if args.format == "table":
        from monitor.alerts.units import threshold_text, value_text

        kinds = frame["kind"].tolist()
        for col in ("value", "peak"):
            frame[col] = [value_text(k, v) for k, v in zip(kinds, frame[col], strict=True)]
        frame["threshold"] = [threshold_text(k, v)
                              for k, v in zip(kinds, frame["threshold"], strict=True)]
        frame = frame.drop(columns=["kind"])
    print_frame(frame, args.format)
    return 0


def _ack_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("id", type=int, help="alert id (see comove alerts)")
    parser.add_argument("--by", required=True, metavar="NAME", help="who acknowledges")
    parser.add_argument("--note", default="", metavar="TEXT", help="what was decided or seen")


@command("ack", "Acknowledge an alert: it stays open but leaves the needs-attention list "
         "and is no longer reminded.", _ack_args)
def _ack(args: argparse.Namespace) -> int:
    from monitor.pipeline import acknowledge, open_settings_store

    settings = load(args)
    alert = acknowledge(open_settings_store(settings), settings, args.id, by=args.by,
                        note=args.note)
    print(f"alert {alert.id} ({alert.rule}, {alert.target}, opened {alert.opened_on}) "
          f"acknowledged by {alert.acknowledged_by}")
    return 0


def _mute_args(parser: argparse.ArgumentParser) -> None:
    what = parser.add_mutually_exclusive_group(required=True)
    what.add_argument("--rule", metavar="NAME", help="mute every alert of this rule")
    what.add_argument("--pair", metavar="A/B", help="mute this pair (or group or symbol "
                      "target) under every rule")
    parser.add_argument("--from", dest="from_on", type=date_argument, metavar="DATE",
                        help="first day of the mute (default: today)")
    parser.add_argument("--until", type=date_argument, required=True, metavar="DATE",
                        help="last day of the mute (inclusive)")
    parser.add_argument("--reason", required=True, metavar="TEXT", help="kept with the mute")
    parser.add_argument("--allow-past", action="store_true",
                        help="accept days before today (muting history before a backfill; "
                             "days already evaluated change only when replayed)")


@command("mute", "Mute a rule or a pair until a date: conditions are still recorded, just "
         "not announced.", _mute_args)
def _mute(args: argparse.Namespace) -> int:
    from monitor.pipeline import mute, open_settings_store

    settings = load(args)
    mute_id = mute(open_settings_store(settings), settings, rule=args.rule, pair=args.pair,
                   until=args.until, reason=args.reason, from_on=args.from_on,
                   allow_past=args.allow_past)
    first = f" from {args.from_on}" if args.from_on else ""
    print(f"mute {mute_id}: {args.rule or args.pair}{first} until {args.until} "
          f"(comove unmute {mute_id} lifts it)")
    if args.allow_past:
        print("days already evaluated keep what they announced; `comove backfill --force` "
              "replays them with this mute")
    return 0


def _mutes_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--all", action="store_true",
                        help="also the mutes that have ended")
    add_format_option(parser)


@command("mutes", "List the mutes (active and coming; --all also the ended ones) with their "
         "id, rule or target, days and reason.", _mutes_args)
def _mutes(args: argparse.Namespace) -> int:
    from monitor.pipeline import list_mutes, open_settings_store

    settings = load(args)
    frame = list_mutes(open_settings_store(settings), settings, include_ended=args.all)
    print_frame(frame, args.format)
    return 0


def _unmute_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("id", type=int, help="mute id (see comove mutes)")


@command("unmute", "Lift a mute from today on (its past days stay as they were; a mute that "
         "has not started is removed).", _unmute_args)
def _unmute(args: argparse.Namespace) -> int:
    from monitor.pipeline import open_settings_store, unmute

    settings = load(args)
    print(unmute(open_settings_store(settings), settings, args.id))
    return 0


def _unack_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("id", type=int, help="alert id (see comove alerts)")


@command("unack", "Withdraw an alert's acknowledgement: it needs attention again and its "
         "reminders resume.", _unack_args)
def _unack(args: argparse.Namespace) -> int:
    from monitor.pipeline import open_settings_store, unacknowledge

    settings = load(args)
    alert = unacknowledge(open_settings_store(settings), settings, args.id)
    print(f"alert {alert.id} ({alert.rule}, {alert.target}, opened {alert.opened_on}) is no "
          f"longer acknowledged; state {alert.state}")
    return 0


def _series_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("a", metavar="A", help="first instrument")
    parser.add_argument("b", metavar="B", help="second instrument")
    parser.add_argument("--measure", action="append", metavar="SPEC",
                        help="e.g. rolling:63, ewma:hl=21, ewma:lambda=0.94,mean=zero, rank:63, "
                             "beta:60 (hedge ratio), r2:60 (repeatable; default: every "
                             "measure of [correlation] measures)")
    parser.add_argument("--start", type=date_argument, metavar="DATE", help="first date printed")
    parser.add_argument("--end", type=date_argument, metavar="DATE",
                        help="last date printed (later closes are not read)")
    add_format_option(parser)


@command("series", "Print one pair's measures from the store: date, measure, value, band "
         "low, band high and n.", _series_args)
def _series(args: argparse.Namespace) -> int:
    from monitor.pipeline import open_settings_store, series

    settings = load(args)
    store = open_settings_store(settings)
    measures = args.measure or list(settings.correlation.measures)
    frames = [series(store, settings, args.a, args.b, spec, start=args.start, end=args.end)
              for spec in measures]
    frame = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    print_frame(frame, args.format)
    return 0
