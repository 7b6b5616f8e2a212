"""comove's log: stderr plus a rotating file beside the store, through `logging`."""

from __future__ import annotations

import logging
import sys
from logging.handlers import RotatingFileHandler
from pathlib import Path
from typing import TextIO

LOG_FILE = "comove.log"


LOG_MAX_BYTES = 5 * 1024 * 1024


LOG_BACKUPS = 5


_OUR_HANDLER = "_comove_handler"


class _CurrentStream(logging.StreamHandler):  # type: ignore[type-arg, unused-ignore]
    """A console handler that writes to `sys.stdout` or `sys.stderr` as it is at each line.

    A plain StreamHandler keeps the stream it was given, so a handler made while the
    standard stream was replaced (a test's capture, a wrapper that redirects output) goes
    on writing to that stream after it is closed, and every later line becomes a logging
    error. Looking the stream up per line follows whatever the process uses now.
    """

    def __init__(self, name: str) -> None:
        self._standard = name
        super().__init__()

    @property  # type: ignore[override, unused-ignore]
    def stream(self) -> TextIO:
        return getattr(sys, self._standard)  # type: ignore[no-any-return, unused-ignore]

    @stream.setter
    def stream(self, value: TextIO) -> None:
        """Ignored: the stream is always the current standard one."""


def setup_logging(
    log_dir: Path, *, level: int = logging.INFO, stream: TextIO | None = None
) -> logging.Logger:
    """Send comove's log to stderr and to a rotating `comove.log` in `log_dir`.

    Parameters
    ----------
    log_dir : Path
        Folder of the log file (the store's folder); created if missing.
    level : int
        Level of the "comove" logger. APScheduler's own messages are kept at WARNING and above
        (its tracebacks of failed runs go to the same places).
    stream : TextIO, optional
        Where the console copy goes; by default `sys.stderr` as it is at each line.

    Returns
    -------
    logging.Logger
        The "comove" logger. Calling again replaces the handlers this function added, so
        there are never duplicate lines.
    """
    log_dir.mkdir(parents=True, exist_ok=True)
    formatter = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    console: logging.Handler = (logging.StreamHandler(stream) if stream is not None
                                else _CurrentStream("stderr"))
    logfile = RotatingFileHandler(
        log_dir / LOG_FILE, maxBytes=LOG_MAX_BYTES, backupCount=LOG_BACKUPS, encoding="utf-8"
    )
    handlers: list[logging.Handler] = [console, logfile]
    for handler in handlers:
        handler.setFormatter(formatter)
        setattr(handler, _OUR_HANDLER, True)

    comove = logging.getLogger("comove")
    targets = ((comove, level), (logging.getLogger("apscheduler"), logging.WARNING))
    previous = {
        h for target, _ in targets for h in target.handlers if getattr(h, _OUR_HANDLER, False)
    }
    for old in previous:
        for target, _ in targets:
            target.removeHandler(old)
        old.close()
    for target, target_level in targets:
        for handler in handlers:
            target.addHandler(handler)
        target.setLevel(target_level)
        # Our handlers are the output; passing records on to the root would print them twice
        # wherever the host also configured logging.
        target.propagate = False
    return comove


def console_logging(stream: TextIO | None = None, *, level: int = logging.INFO,
                    standard: str = "stdout") -> logging.Logger:
    """Show comove's messages from `level` up as plain lines on `stream` (by default the
    process's `standard` stream, "stdout" or "stderr", as it is at each line).

    The command line passes INFO, WARNING for `-q` and DEBUG for `-v`, and "stderr" when
    the command's stdout is data for a program (`--format json`, `bench ... --json`), so
    progress lines never mix into it.

    What the shell commands print while they work (ingested files, backfill and demo
    progress, the daily run's summary) goes through the "comove" logger; this is the
    command line's view of it. A later `setup_logging` (the scheduler process) replaces it.
    """
    comove = logging.getLogger("comove")
    for old in [h for h in comove.handlers if getattr(h, _OUR_HANDLER, False)]:
        comove.removeHandler(old)
    handler: logging.Handler = (logging.StreamHandler(stream) if stream is not None
                                else _CurrentStream(standard))
    handler.setFormatter(logging.Formatter("%(message)s"))
    setattr(handler, _OUR_HANDLER, True)
    comove.addHandler(handler)
    comove.setLevel(level)
    comove.propagate = False
    return comove
