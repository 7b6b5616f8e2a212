"""What every `comove` command shares: the registry behind `@command`, the date and
output-format options, loading the settings, printing a frame, JSON for the shell."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sys
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import pandas as pd

Handler = Callable[[argparse.Namespace], int]


@dataclass(frozen=True)
class Command:
    name: str
    help: str
    handler: Handler
    configure: Callable[[argparse.ArgumentParser], None]
    needs_config: bool = True


COMMANDS: dict[str, Command] = {}


def _no_arguments(parser: argparse.ArgumentParser) -> None:
    return None


def command(
    name: str,
    help: str,
    arguments: Callable[[argparse.ArgumentParser], None] = _no_arguments,
    *,
    needs_config: bool = True,
) -> Callable[[Handler], Handler]:
    """Register the decorated function as the handler of `comove NAME`."""

    def wrap(handler: Handler) -> Handler:
        COMMANDS[name] = Command(name, help, handler, arguments, needs_config)
        return handler

    return wrap


def date_argument(text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a date (YYYY-MM-DD)") from None


def add_format_option(parser: argparse.ArgumentParser) -> None:
    """The output format option shared by every listing command."""
    parser.add_argument("--format", choices=("table", "csv", "json"), default="table",
                        help="table for reading (default), csv or json for other tools")


def load(args: argparse.Namespace) -> Any:
    from monitor.config import load_settings

    return load_settings(getattr(args, "config", None))


def print_frame(frame: pd.DataFrame, fmt: str = "table") -> None:
    """Print a frame as an aligned table ('-' for what is missing), CSV or JSON records
    (monitor.tabular: dates as YYYY-MM-DD, full precision, null for missing)."""
    from monitor import tabular

    if fmt == "csv":
        sys.stdout.write(tabular.to_csv(frame))
    elif fmt == "json":
        sys.stdout.write(tabular.to_json(frame) + "\n")
    elif frame.empty:
        print("(none)")
    else:
        plain = tabular.plain_dates(frame)
        shown = plain.astype(object).where(plain.notna(), "-")
        print(shown.to_string(index=False))


def _json_default(value: Any) -> Any:
    if isinstance(value, dt.date | dt.datetime):
        return value.isoformat()
    raise TypeError(type(value).__name__)


def dumps(value: Any) -> str:
    return json.dumps(value, default=_json_default, indent=1)
