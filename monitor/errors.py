"""Domain exceptions; the CLI turns each into one `Error: ...` line and exit code 1."""

from __future__ import annotations


class ComoveError(Exception):
    """Base class of every error comove reports to a user."""


class ConfigError(ComoveError):
    """The settings file has a bad key, value or structure."""


class SpecError(ConfigError):
    """A measure spec such as `rolling:63` cannot be parsed."""


class IngestError(ComoveError):
    """A closes file could not be ingested; `problems` lists every bad row."""

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems = problems or []


class JobStoreError(ComoveError):
    """The scheduler's job store cannot be opened (the main store has storage.StoreError)."""
