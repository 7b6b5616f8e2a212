"""The order in which the digest shows alerts, largest changes and data issues.

Sort keys only: the renderer sorts the context's lists with them, so the pipeline may pass
them in any order. Every key ends with names and ids so that the order is stable.
"""

from __future__ import annotations

import math
from datetime import date
from typing import Any

from monitor.digest.context import SEVERITY_RANK, AlertView, DataIssueView, MoverView, _finite

DATA_ISSUE_KINDS = ("stale", "missing", "suspect", "restated", "retracted")
"""Known kinds of data issue, in display order; other words are shown after them."""


def alert_sort_key(alert: AlertView) -> tuple[Any, ...]:
    """Sort key putting the most pressing alert first.

    Severity first (critical, warning, info); within a severity, shift alerts by
    ascending p-value, then level alerts by how far the value is past its level
    (largest first); ties by pair and id so the order is stable.
    """
    p = alert.p_value if _finite(alert.p_value) else math.inf
    excess = alert.excess
    return (
        SEVERITY_RANK[alert.severity],
        p,
        -excess if math.isfinite(excess) else math.inf,
        alert.a.symbol,
        alert.b.symbol,
        str(alert.id),
    )


def mover_sort_key(mover: MoverView) -> tuple[Any, ...]:
    """Sort key: largest |change| first, unknown changes last, ties by pair and measure."""
    change = mover.change
    return (-abs(change) if math.isfinite(change) else math.inf, mover.pair, mover.measure)


def issue_sort_key(issue: DataIssueView) -> tuple[Any, ...]:
    """Sort key: by kind in `DATA_ISSUE_KINDS` order (unknown kinds after), then symbol, day."""
    rank = DATA_ISSUE_KINDS.index(issue.kind) if issue.kind in DATA_ISSUE_KINDS else 99
    return (rank, issue.kind, issue.symbol, issue.day or date.min)


__all__ = ["DATA_ISSUE_KINDS", "alert_sort_key", "issue_sort_key", "mover_sort_key"]
