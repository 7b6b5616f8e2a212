"""The scheduling shell of the daily run: the long-running process that fires it.

This module owns the scheduler process (`run_scheduler`: APScheduler's blocking scheduler
with its SQLAlchemy job store, misfire grace, carried-over run times, clean stops) and the
`comove run` command (`run_daily_command`: once now, or the process, catching up missed
run dates at start). When it fires is the trigger's business (`monitor.trigger`); which
dates are run dates is the calendar's (`monitor.calendar`); logging is `monitor.logs`.

Time rules, as APScheduler 3.11's `CronTrigger` behaves (checked in tests/test_scheduler.py):

- A time inside the spring-forward gap (02:30 on 2026-03-29 in Europe/Berlin, which does not
  exist) fires on that date at the instant 02:30 would be under the old offset, that is 03:30
  local summer time: the same date, one hour later on the wall clock.
- A time inside the fall-back overlap (02:30 on 2026-10-25 in Europe/Berlin, which happens
  twice) would fire twice under a plain cron trigger; `HolidayAwareTrigger` keeps only the
  first occurrence, so there is at most one run per local date.
"""

from __future__ import annotations

import datetime as dt
import logging
import re
import signal
import threading
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import FrameType
from typing import Any

from apscheduler.events import (
    EVENT_JOB_ERROR,
    EVENT_JOB_EXECUTED,
    EVENT_JOB_MAX_INSTANCES,
    EVENT_JOB_MISSED,
    EVENT_SCHEDULER_STARTED,
    JobEvent,
)
from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.jobstores.sqlalchemy import SQLAlchemyJobStore
from apscheduler.schedulers import SchedulerNotRunningError
from apscheduler.schedulers.blocking import BlockingScheduler
from apscheduler.triggers.base import BaseTrigger

from monitor.calendar import UTC, Schedule, as_of_for
from monitor.config import Settings
from monitor.errors import ComoveError, JobStoreError
from monitor.logs import setup_logging
from monitor.pipeline import DailyReport, missed_days, run_days, schedule_of

# HolidayAwareTrigger stays importable here: job stores written before the trigger had its
# own module pickled it as monitor.scheduler.HolidayAwareTrigger.
from monitor.trigger import HolidayAwareTrigger, make_trigger, previous_fire_time
from storage import Store

__all__ = ["EXIT_DATA", "EXIT_EMAIL", "HolidayAwareTrigger", "once_exit_code",
           "run_daily_command", "run_scheduler"]

JOB_ID = "comove-daily"
"""Id of the one job in the job store; a restart replaces it instead of adding a second."""


MISFIRE_GRACE = dt.timedelta(hours=6)
"""How late a fire may still run: a scheduler that was asleep or down at 18:30 and is back
by 00:30 still sends that evening's digest; later than that the day is left to the explicit
catch-up (`business_days_between`) rather than surprising the desk overnight. It must stay
below the shortest gap between two fires (23 h across a DST change), so that a late run's
as-of date is never ambiguous."""


@dataclass
class _Registration:
    """What `_run_job` needs in this process; kept out of the job store on purpose."""

    job: Callable[[dt.date], object]
    schedule: Schedule
    uses_schedule_trigger: bool
    logger: logging.Logger
    busy: threading.Lock = field(default_factory=threading.Lock)


_REGISTRY: dict[str, _Registration] = {}


def _run_job(job_id: str = JOB_ID) -> object:
    """The function the job store refers to by name (`monitor.scheduler:_run_job`).

    The stored job holds only this textual reference and `job_id`; the real callable lives in
    the registry of the process that called `run_scheduler`, so no closure is ever pickled and
    a restart picks up whatever job the new process registers.
    """
    registration = _REGISTRY.get(job_id)
    if registration is None:
        raise ComoveError(f"job {job_id!r}: no daily job is registered in this process")
    schedule = registration.schedule
    now = dt.datetime.now(schedule.zone)
    # The run executes within MISFIRE_GRACE of its fire time, which is shorter than the gap
    # between two fires, so the latest fire time at or before now is the one being run.
    fire = previous_fire_time(schedule, now) if registration.uses_schedule_trigger else None
    as_of = as_of_for(fire or now, schedule)
    with registration.busy:
        registration.logger.info("daily run for as-of %s started", as_of)
        result = registration.job(as_of)
        registration.logger.info("daily run for as-of %s finished", as_of)
    return result


def _describe(moment: dt.datetime | None, schedule: Schedule) -> str:
    if moment is None:
        return "none scheduled"
    local = moment.astimezone(schedule.zone)
    return f"{local.isoformat(sep=' ', timespec='minutes')} ({schedule.timezone})"


def _mask_password(url: str) -> str:
    return re.sub(r"(://[^:/@]*:)[^@]*@", r"\1***@", url)


def _open_jobstore(url: str, scheduler: BlockingScheduler) -> SQLAlchemyJobStore:
    try:
        store = SQLAlchemyJobStore(url=url)
        store.start(scheduler, "default")
    except Exception as exc:  # the driver's own error is the useful part of the message
        first_line = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise JobStoreError(
            f"jobstore_url: {_mask_password(url)!r} cannot be opened: {first_line}"
        ) from None
    return store


def _stored_next_run_time(store: SQLAlchemyJobStore, logger: logging.Logger) -> dt.datetime | None:
    try:
        job = store.lookup_job(JOB_ID)
    except Exception as exc:  # an unreadable stored job is replaced, not fatal
        logger.warning("stored job %r could not be read (%s); replacing it", JOB_ID, exc)
        return None
    return None if job is None else job.next_run_time


def carried_over_run_time(
    stored: dt.datetime | None,
    trigger: BaseTrigger,
    now: dt.datetime,
    grace: dt.timedelta = MISFIRE_GRACE,
) -> dt.datetime | None:
    """The stored next run time to keep when a restart happens just after it was missed.

    Parameters
    ----------
    stored : datetime or None
        The next run time the job store held from the previous process.
    trigger : BaseTrigger
        The trigger of the new process.
    now : datetime
        Aware current time.
    grace : timedelta
        How late a run may still happen.

    Returns
    -------
    datetime or None
        `stored` when it is in the past by at most `grace` and still a fire time of `trigger`
        (the schedule did not change), so the missed run happens at once; else None, and the
        next run is computed afresh from `now`.
    """
    if stored is None or stored > now or now - stored > grace:
        return None
    return stored if trigger.get_next_fire_time(None, stored) == stored else None


def run_scheduler(
    schedule: Schedule,
    job: Callable[[dt.date], object],
    *,
    jobstore_url: str,
    on_start: Callable[[dt.datetime | None], None] | None = None,
    logger: logging.Logger | None = None,
    trigger: BaseTrigger | None = None,
) -> None:
    """Run `job(as_of)` on the schedule until SIGINT or SIGTERM; blocks.

    Parameters
    ----------
    schedule : Schedule
        Days, time, zone and holidays of the run.
    job : callable
        Called with the run's as-of date (local date of the fire time in the schedule's zone).
        An exception is logged and the scheduler keeps going for the next fire.
    jobstore_url : str
        SQLAlchemy URL of the persistent job store (a SQLite file beside the store, or the
        desk's PostgreSQL database). It holds one job, `JOB_ID`, replaced at every start.
    on_start : callable, optional
        Called once, when the job is in the job store and before the first wait, with the next
        fire time (None if there is none); an exception from it stops the scheduler and is
        raised.
    logger : logging.Logger, optional
        Defaults to the "comove.scheduler" logger (see `setup_logging`).
    trigger : BaseTrigger, optional
        Replaces the schedule's trigger (tests use a short interval); the as-of date is then
        the local date of the moment the job starts.

    Raises
    ------
    JobStoreError
        The job store cannot be opened.

    Notes
    -----
    The job is stored with `coalesce=True` (missed fires run once), `max_instances=1` and
    `misfire_grace_time` of `MISFIRE_GRACE`. A restart within that grace after a missed fire
    runs the missed day at once (see `carried_over_run_time`); days missed for longer are left
    to the caller's catch-up. Signal handlers are installed only in the main thread; a run in
    progress when the signal comes is allowed to finish before this function returns.
    """
    log = logger or logging.getLogger("comove.scheduler")
    zone = schedule.zone
    fire_trigger = trigger if trigger is not None else make_trigger(schedule)
    scheduler = BlockingScheduler(
        timezone=zone, executors={"default": ThreadPoolExecutor(max_workers=1)}
    )
    store = _open_jobstore(jobstore_url, scheduler)
    scheduler.add_jobstore(store, "default")

    now = dt.datetime.now(zone)
    carried = carried_over_run_time(_stored_next_run_time(store, log), fire_trigger, now)
    next_run = carried or fire_trigger.get_next_fire_time(None, now)
    if carried is not None:
        log.info("run missed at %s happens now", _describe(carried, schedule))
    job_options: dict[str, Any] = {} if next_run is None else {"next_run_time": next_run}
    registration = _Registration(job, schedule, trigger is None, log)
    stopper = _Stopper(scheduler, log)
    previous_handlers: dict[int, Any] = {}
    _REGISTRY[JOB_ID] = registration
    try:
        scheduler.add_job(
            _run_job,
            trigger=fire_trigger,
            id=JOB_ID,
            name="comove daily run",
            kwargs={"job_id": JOB_ID},
            replace_existing=True,
            coalesce=True,
            misfire_grace_time=int(MISFIRE_GRACE.total_seconds()),
            max_instances=1,
            **job_options,
        )
        scheduler.add_listener(
            _event_logger(fire_trigger, schedule, log),
            EVENT_JOB_ERROR | EVENT_JOB_EXECUTED | EVENT_JOB_MISSED | EVENT_JOB_MAX_INSTANCES,
        )
        failures: list[BaseException] = []
        scheduler.add_listener(
            _started_handler(scheduler, schedule, log, stopper, on_start, failures),
            EVENT_SCHEDULER_STARTED,
        )
        previous_handlers = stopper.install()
        if not stopper.requested.is_set():
            scheduler.start()
        if failures:
            raise failures[0]
    finally:
        stopper.restore(previous_handlers)
        if scheduler.running:
            scheduler.shutdown(wait=False)
        else:
            store.shutdown()
        if registration.busy.locked():
            log.info("waiting for the run in progress to finish")
        with registration.busy:
            pass
        if _REGISTRY.get(JOB_ID) is registration:
            del _REGISTRY[JOB_ID]
        log.info("scheduler stopped")


def _started_handler(
    scheduler: BlockingScheduler,
    schedule: Schedule,
    log: logging.Logger,
    stopper: _Stopper,
    on_start: Callable[[dt.datetime | None], None] | None,
    failures: list[BaseException],
) -> Callable[[object], None]:
    """Announce the next run once the job is in the job store (the scheduler adds it at start).

    APScheduler swallows a listener's exceptions, so a failing `on_start` is kept in
    `failures`, the scheduler is stopped and `run_scheduler` raises it after `start` returns.
    """

    def started(event: object) -> None:
        if stopper.requested.is_set():
            # The signal came between the check before start() and now.
            stopper.stop()
            return
        try:
            stored = scheduler.get_job(JOB_ID)
            next_run = None if stored is None else stored.next_run_time
            log.info("next run at %s", _describe(next_run, schedule))
            if on_start is not None:
                on_start(next_run)
        except BaseException as exc:  # re-raised in the caller's thread
            failures.append(exc)
            stopper.stop()

    return started


def _event_logger(
    trigger: BaseTrigger, schedule: Schedule, log: logging.Logger
) -> Callable[[JobEvent], None]:
    """Log the outcome of each fire and the next fire time after it."""

    def next_run(scheduled: dt.datetime | None) -> str:
        # Computed from the trigger the way the scheduler does it, not read back from the job
        # store: a quick job's event can arrive before the scheduler has stored the next time.
        if scheduled is None:
            return "unknown"
        return _describe(trigger.get_next_fire_time(scheduled, dt.datetime.now(UTC)), schedule)

    def listener(event: JobEvent) -> None:
        if event.code == EVENT_JOB_MAX_INSTANCES:
            times = getattr(event, "scheduled_run_times", None) or [None]
            log.warning(
                "run skipped: the previous run is still going; next run at %s",
                next_run(times[-1]),
            )
            return
        # Every other subscribed code comes as a JobExecutionEvent with these attributes.
        scheduled_time = getattr(event, "scheduled_run_time", None)
        scheduled = _describe(scheduled_time, schedule)
        if event.code == EVENT_JOB_ERROR:
            exc = getattr(event, "exception", None)
            log.error(
                "run scheduled at %s failed: %s: %s; next run at %s",
                scheduled,
                type(exc).__name__,
                exc,
                next_run(scheduled_time),
            )
        elif event.code == EVENT_JOB_MISSED:
            log.warning(
                "run scheduled at %s was missed by more than %s; next run at %s",
                scheduled,
                MISFIRE_GRACE,
                next_run(scheduled_time),
            )
        else:
            log.info("next run at %s", next_run(scheduled_time))

    return listener


class _Stopper:
    """SIGINT/SIGTERM handling: ask the scheduler to stop, from a thread of its own.

    The handler runs in the main thread, which may be inside the scheduler's job processing
    holding its locks; shutting down from a helper thread waits for that to finish instead of
    tearing the job store down under it.
    """

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self, scheduler: BlockingScheduler, log: logging.Logger) -> None:
        self.scheduler = scheduler
        self.log = log
        self.requested = threading.Event()
        self._lock = threading.Lock()

    def install(self) -> dict[int, Any]:
        if threading.current_thread() is not threading.main_thread():
            return {}
        previous: dict[int, Any] = {}
        for signum in self.SIGNALS:
            previous[signum] = signal.signal(signum, self._handle)
        return previous

    def restore(self, previous: Mapping[int, Any]) -> None:
        for signum, handler in previous.items():
            signal.signal(signum, handler)

    def _handle(self, signum: int, frame: FrameType | None) -> None:
        if self.requested.is_set():
            return
        self.requested.set()
        self.log.info("received %s; stopping", signal.Signals(signum).name)
        threading.Thread(target=self.stop, name="comove-stop", daemon=True).start()

    def stop(self) -> None:
        with self._lock:
            try:
                self.scheduler.shutdown(wait=False)
            except SchedulerNotRunningError:
                pass


# --------------------------------------------------------------------------- `comove run`


def run_daily_command(store: Store, settings: Settings, *, once: bool, as_of: dt.date | None,
                      force: bool, catch_up: bool) -> int:
    """`comove run`: once now, or the scheduler (catching up missed days at start)."""
    log_dir = (Path(store.engine.url.database).parent if store.is_sqlite and
               store.engine.url.database else settings.base_dir)
    logger = setup_logging(log_dir)
    schedule = schedule_of(settings)
    if once:
        day = as_of or dt.datetime.now(schedule.zone).date()
        return once_exit_code(run_days(store, settings, day, force=force, catch_up=catch_up))

    def job(day: dt.date) -> object:
        return run_days(store, settings, day, catch_up=True)

    if catch_up:
        # The days whose scheduled fire has passed with no completed run: through the
        # as-of date of the latest fire time (today once today's time has passed).
        fired = previous_fire_time(schedule, dt.datetime.now(schedule.zone))
        if fired is not None:
            missed = missed_days(store, settings, as_of_for(fired, schedule))
            if missed:
                logger.info("catching up %d missed day(s): %s", len(missed),
                            ", ".join(map(str, missed)))
                run_days(store, settings, missed[-1], catch_up=True)
            else:
                logger.info("no missed run dates to catch up")
    jobstore = _jobstore_url(store, settings)
    logging.getLogger("comove").info("schedule state (next run time) kept in %s",
                                     jobstore.split("@")[-1])
    run_scheduler(schedule, job, jobstore_url=jobstore, logger=logger)
    return 0


EXIT_DATA = 3
"""`comove run --once`: the run finished, but a file was rejected (or had lines skipped
under `[sources] skip_bad`), a day had no closes (the
data-feed alert) or a critical alert opened on the day run."""
EXIT_EMAIL = 4
"""`comove run --once`: a digest could not be sent, or may have been sent (the connection
dropped after the server took the message); it stays in the outbox. Wins over EXIT_DATA."""


def once_exit_code(reports: Sequence[DailyReport]) -> int:
    """0 when every day ran cleanly; EXIT_EMAIL when a digest failed or may have been sent;
    else EXIT_DATA when a file was rejected, a day had no closes or a critical alert
    opened. Errors never get here: the command line exits 1 with the message."""
    email = any(r.status == "failed" or r.digest_error or
                (r.digest is not None and r.digest.status in ("failed", "maybe sent"))
                for r in reports)
    if email:
        return EXIT_EMAIL
    data = any(r.feed_problem
               or (r.collected is not None and (r.collected.rejected or r.collected.skipped))
               or (r.evaluation is not None and r.as_of in r.evaluation.critical_opened)
               for r in reports)
    return EXIT_DATA if data else 0


def _jobstore_url(store: Store, settings: Settings) -> str:
    if store.is_sqlite and store.engine.url.database:
        path = Path(store.engine.url.database)
        return f"sqlite:///{path.with_name(path.stem + '-schedule.sqlite')}"
    return store.engine.url.render_as_string(hide_password=False)
