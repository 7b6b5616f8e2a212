"""The only wiring between the store and the computation.

The CLI, the scheduler, the demo and the benchmarks call these functions; each opens what
it needs from the store, hands plain frames and arrays to the pure packages and writes the
results back. Modules: ``store`` (opening, reading closes and returns), ``ingest`` (one
file, one transaction), ``evaluate`` (replay over a range, committed in chunks), ``lease``
(one evaluator at a time), ``review`` (alerts, acknowledgements, mutes, series),
``publish`` (digest and pages), ``daily`` (the evening run and its catch-up).
"""

from monitor.pipeline.daily import (
    CollectReport,
    DailyReport,
    collect_inbox,
    inbox_files,
    last_completed_daily,
    missed_days,
    run_daily,
    run_days,
)
from monitor.pipeline.evaluate import EvaluationReport, backfill, build_plan, evaluate_range
from monitor.pipeline.ingest import IngestReport, ingest_file
from monitor.pipeline.lease import LeaseHeld, evaluation_lease
from monitor.pipeline.publish import (
    DigestOutcome,
    build_pages,
    digest_context,
    digest_folder,
    render_digest_files,
    send_digest,
)
from monitor.pipeline.review import (
    acknowledge,
    canonical_pair,
    list_alerts,
    list_mutes,
    mute,
    mute_state,
    series,
    unacknowledge,
    unmute,
)
from monitor.pipeline.store import (
    FEED_RULE,
    desk_today,
    init_store,
    instrument_summary,
    latest_close_date,
    open_settings_store,
    pages_folder,
    read_closes,
    read_returns,
    schedule_of,
    universe,
)

__all__ = [
    "FEED_RULE",
    "CollectReport",
    "DailyReport",
    "DigestOutcome",
    "EvaluationReport",
    "IngestReport",
    "LeaseHeld",
    "acknowledge",
    "backfill",
    "build_pages",
    "build_plan",
    "canonical_pair",
    "collect_inbox",
    "desk_today",
    "digest_context",
    "digest_folder",
    "evaluate_range",
    "evaluation_lease",
    "inbox_files",
    "ingest_file",
    "init_store",
    "instrument_summary",
    "last_completed_daily",
    "latest_close_date",
    "list_alerts",
    "list_mutes",
    "missed_days",
    "mute",
    "mute_state",
    "open_settings_store",
    "pages_folder",
    "read_closes",
    "read_returns",
    "render_digest_files",
    "run_daily",
    "run_days",
    "schedule_of",
    "send_digest",
    "series",
    "unacknowledge",
    "universe",
    "unmute",
]
