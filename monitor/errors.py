"""Domain exceptions; the CLI turns each into one `Error: ...` line and exit code 1."""

from __future__ import annotations


class ComoveError(Exception):
    """Base class of every error comove reports to a user."""


class ConfigError(ComoveError):
    """The settings file has a bad key, value or structure.

    `problems` holds every problem found when the whole file was checked (the message
    names the first and counts the rest); a single problem when raised on its own.
    """

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems = problems if problems is not None else [message]


class SpecError(ConfigError):
    """A measure spec such as `rolling:63` cannot be parsed."""


class EngineInputError(ComoveError, ValueError):
    """A bad argument to the engine: an array of the wrong shape or content, a window,
    level, day or instrument index out of range. The one error type of `monitor.engine`
    (a `ValueError` too, as numerical code is expected to raise)."""


class IngestError(ComoveError):
    """A closes file could not be ingested; `problems` lists every bad row."""

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems = problems or []


class LeaseHeld(ComoveError):
    """Another process holds the evaluation lease (a daily run or a backfill is running)."""


class MailError(ComoveError):
    """The digest could not be handed to the SMTP server."""

    def __init__(
        self, message: str, *, host: str, port: int, attempts: int, reason: str, permanent: bool,
        maybe_sent: bool = False,
    ) -> None:
        super().__init__(message)
        self.host = host
        self.port = port
        self.attempts = attempts
        self.reason = reason
        self.permanent = permanent
        # The server took the whole message (the final dot) and then never answered: it may
        # have delivered it, so it must not be sent again without being asked to.
        self.maybe_sent = maybe_sent


class JobStoreError(ComoveError):
    """The scheduler's job store cannot be opened (the main store has storage.StoreError)."""
