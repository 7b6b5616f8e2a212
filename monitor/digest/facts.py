"""The stored facts the digest is built from, as the pipeline read them (no computation).

Kept apart from `monitor.digest.build` so the blocks that read them (the Data feed block
in `monitor.digest.feed`) need not import the builder that imports them.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["AlertFacts"]


@dataclass(frozen=True)
class AlertFacts:
    """One stored alert, as the pipeline read it (see storage.alerts.AlertRow)."""

    id: int
    rule: str
    target: str
    opened_on: dt.date
    first_breach_on: dt.date
    state: str
    cleared_on: dt.date | None
    severity: str
    rule_kind: str
    announced: bool
    acknowledged_by: str | None = None
    acknowledged_at: dt.datetime | None = None
    acknowledged_note: str | None = None
    reminded_today: bool = False
    event_today: Mapping[str, Any] | None = None
    """The event of the digest's day (opened / continuing / cleared), if any."""
