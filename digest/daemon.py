"""``digest serve``: the nightly job on a schedule, unattended, one process per ledger.

A thin shell around :func:`digest.jobs.run_job` on APScheduler 3.x's ``BlockingScheduler``
with an in-memory job store: the schedule lives only in the config (``[schedule] cron`` in
``[schedule] timezone``), nothing is pickled, and what has run is the ledger's business.
The config is read once at start; restart the daemon after editing it (the data files are
of course read afresh by every run).

What happens, in order::

    serve(config)
      check the relay password variable          ConfigError -> exit 2 (cli)
      open the ledger, take its lock "daemon"    LockHeld (names the pid) -> exit 1 (cli)
      crash recovery, under the lock:
        runs left 'running'       -> failed 'interrupted'   (ledger.mark_abandoned_runs)
        messages left 'sending'   -> pending, due now       (outbox.recover_sending)
      plan_start: is a run owed?  -> one catch-up run now, for the missed slot
      jobs (two one-thread executors):
        "nightly"  the cron trigger; max_instances=1, coalesce=True, misfire grace = grace
        "catch-up" once, at start, when plan_start says a slot is owed
        "deliver"  every DELIVERY_EVERY (and once at start): outbox -> relay, with backoff
      SIGTERM/SIGINT -> stop: no new job starts, a running one finishes, then exit 0

Each run is labelled with its slot (``scheduled_for``), so the ledger refuses a second run
of a slot that is running or done (a double fire, a catch-up racing the schedule). The job
works the slot out itself as the trigger's latest fire time not after "now" (APScheduler
passes no run time to the job): see :func:`latest_slot`.

Daylight saving time. APScheduler fires a wall-clock cron twice when the clock goes back
(libraries.md §1.3: Europe/London ``30 1 * * *`` ran at 00:30Z and 01:30Z). Like Vixie cron
(cron(8): "if the time has moved backwards by less than 3 hours, those jobs that fall into
the repeated time will not be re-run"), a slot with the same local wall-clock time as the
previous scheduled run, less than three hours after it, is skipped. Slots are stepped
through in UTC: stepping a local time in the repeated hour by wall-clock arithmetic drops
its ``fold`` and finds the same slot again.

Only :func:`digest.jobs.default_now` reads the clock (passed in as ``clock``); every
decision is a pure function of the "now" it is given.
"""

from __future__ import annotations

import logging
import os
import signal
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent import futures
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta, tzinfo
from types import FrameType
from typing import TYPE_CHECKING, Any, NamedTuple

import sqlalchemy as sa
from apscheduler.events import EVENT_SCHEDULER_START, SchedulerEvent
from apscheduler.executors.pool import BasePoolExecutor
from apscheduler.schedulers import SchedulerNotRunningError
from apscheduler.schedulers.blocking import BlockingScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.date import DateTrigger
from apscheduler.triggers.interval import IntervalTrigger

from digest.config import Config
from digest.deliver import DeliveryResult, check_relay
from digest.errors import DigestError
from digest.ledger import Ledger
from digest.ledger_db import OUTBOX, transaction, utc
from digest.logs import run_context
from digest.schedule import make_trigger

if TYPE_CHECKING:
    from digest.jobs import JobOutcome

# The pipeline (digest.jobs: pandas, scipy, matplotlib ...) is imported when first needed:
# right after the lock in serve(), so a second daemon refuses in a moment and `digest
# status`, which uses the schedule functions below, stays light.

log = logging.getLogger("digest.daemon")

Clock = Callable[[], datetime]
LOCK_NAME = "daemon"
DELIVERY_EVERY = timedelta(minutes=5)  # retries with backoff happen between nightly runs
MIN_MISFIRE = timedelta(minutes=1)  # a live fire may be this late even with grace_hours = 0
REPEAT_WINDOW = timedelta(hours=3)  # cron(8): a clock moved back by less than 3 h
NIGHTLY, CATCH_UP, DELIVER = "nightly", "catch-up", "deliver"
_STEP = timedelta(microseconds=1)


# ---- the schedule, as pure functions of "now" -------------------------------------------------


class StartPlan(NamedTuple):
    """What a daemon starting at ``now`` does: run ``catch_up`` at once (None: nothing is
    owed), then wait for ``next_fire``."""

    catch_up: datetime | None
    next_fire: datetime | None


def fire_after(trigger: BaseTrigger, moment: datetime) -> datetime | None:
    """The trigger's first fire time strictly after ``moment``, in UTC.

    Stepping and answering in UTC matters in the repeated hour: a local time there carries
    ``fold=1``, which wall-clock arithmetic drops and which makes ``==`` with any other zone
    false (PEP 495), so slots would not match the ledger's UTC ``scheduled_for``.
    """
    fire = trigger.get_next_fire_time(None, utc(moment, "moment") + _STEP)
    return None if fire is None else fire.astimezone(UTC)


def latest_slot(
    trigger: BaseTrigger, after: datetime, until: datetime, within: timedelta | None = None
) -> datetime | None:
    """The trigger's latest fire time in (``after``, ``until``], or None; with ``within``,
    only a fire time at most that long before ``until`` counts."""
    start = utc(after, "after")
    if within is not None:
        start = max(start, utc(until, "until") - within - _STEP)
    latest = None
    slot = fire_after(trigger, start)
    while slot is not None and slot <= until:
        latest, slot = slot, fire_after(trigger, slot)
    return latest


def zone_of(trigger: BaseTrigger) -> tzinfo:
    zone = getattr(trigger, "timezone", None)
    return zone if isinstance(zone, tzinfo) else UTC


def repeated_hour(slot: datetime, previous: datetime | None, zone: tzinfo) -> bool:
    """True when ``slot`` repeats ``previous``'s local wall-clock time less than three hours
    later: the second pass through the hour the clock went back (see the module docstring)."""
    if previous is None or not timedelta(0) < slot - previous < REPEAT_WINDOW:
        return False
    wall = slot.astimezone(zone).replace(tzinfo=None)
    return wall == previous.astimezone(zone).replace(tzinfo=None)


def _decide(
    trigger: BaseTrigger,
    last_scheduled: datetime | None,
    now: datetime,
    grace: timedelta,
    retry: datetime | None,
) -> tuple[datetime | None, str]:
    if last_scheduled is None:
        return None, "no scheduled run in the ledger yet (a new installation): nothing owed"
    zone = zone_of(trigger)
    last = f"last scheduled run {_local(last_scheduled, zone)}"
    missed = latest_slot(trigger, last_scheduled, now, within=grace)  # bounded: long outages
    if missed is not None and repeated_hour(missed, last_scheduled, zone):
        return None, f"{last}; {_local(missed, zone)} repeats it (clock went back): nothing owed"
    if missed is not None:
        return missed, f"{last}; the slot {_local(missed, zone)} was missed: running it now"
    first = fire_after(trigger, last_scheduled)
    if first is not None and first <= now:
        return None, (
            f"{last}; the slots missed since {_local(first, zone)} are older than the grace "
            f"of {_hours(grace)}: skipped, the next run is on schedule"
        )
    if retry is not None and now - retry <= grace:
        return retry, (
            f"the run for the slot {_local(retry, zone)} was interrupted before it queued any "
            "mail: running it again now"
        )
    return None, f"{last}: nothing owed"


def plan_start(
    trigger: BaseTrigger,
    last_scheduled: datetime | None,
    now: datetime,
    grace: timedelta,
    *,
    retry: datetime | None = None,
) -> StartPlan:
    """Whether a daemon starting at ``now`` owes a run, and when the schedule fires next.

    Owed: the latest slot after ``last_scheduled`` (the ledger's latest ``scheduled_for``,
    whatever that run's status) that is not after ``now`` and at most ``grace`` old; only
    the latest, however many were missed (coalescing). Nothing is owed on a new installation
    (no scheduled run yet) or for the repeated hour of a DST fall-back. ``retry`` is the
    slot of a run that was interrupted before it queued any mail (the daemon works it out
    at start); it is owed again when no newer slot is and it is within ``grace``.
    """
    now = utc(now)
    slot, _ = _decide(trigger, last_scheduled, now, grace, retry)
    return StartPlan(slot, fire_after(trigger, now))


def now_utc() -> datetime:
    """The real clock: :func:`digest.jobs.default_now` (imported when first read)."""
    from digest.jobs import default_now

    return default_now()


def misfire_grace(config: Config) -> timedelta:
    return max(timedelta(hours=config.schedule.grace_hours), MIN_MISFIRE)


# ---- the jobs: module-level functions with plain arguments ---------------------------------------


def scheduled_run(
    config: Config,
    trigger: BaseTrigger,
    slot: datetime | None = None,
    *,
    clock: Clock = now_utc,
    stopping: threading.Event | None = None,
) -> JobOutcome | None:
    """One scheduled run: ``slot`` (a catch-up) or the trigger's latest fire time.

    Never raises: a failed run is recorded in the ledger and the administrator alarmed by
    ``run_job``; here it is logged with the run id, and the daemon waits for the next slot.
    """
    now = clock()
    zone = zone_of(trigger)
    if stopping is not None and stopping.is_set():
        log.info("stopping: no new run started (a missed slot is caught up at the next start)")
        return None
    if slot is None:
        slot = latest_slot(trigger, now - misfire_grace(config), now)
        if slot is None:
            grace = _hours(misfire_grace(config))
            log.warning("fired with no slot of the schedule in the last %s; skipped", grace)
            return None
    try:
        with Ledger.open(config.ledger.url) as ledger:
            previous = ledger.last_scheduled_run()
    except DigestError as exc:
        log.error("run for the slot %s not started: %s", _local(slot, zone), exc)
        return None
    if repeated_hour(slot, previous, zone):
        log.info(
            "slot %s repeats the run of %s (the clock went back): skipped",
            _local(slot, zone),
            _local(previous, zone),  # type: ignore[arg-type]
        )
        return None
    from digest.pipeline import new_run_id

    run_id = new_run_id(now)
    with run_context(run_id):
        return _run(config, trigger, slot, now, run_id, clock)


def _run(
    config: Config, trigger: BaseTrigger, slot: datetime, now: datetime, run_id: str, clock: Clock
) -> JobOutcome | None:
    zone = zone_of(trigger)
    log.info("run %s for the slot %s started", run_id, _local(slot, zone))
    started = time.monotonic()
    from digest.jobs import run_job

    outcome = None
    try:
        outcome = run_job(config, now=now, scheduled_for=slot, run_id=run_id, clock=clock)
    except DigestError as exc:
        log.error(
            "run %s failed after %.1f s: %s (recorded in the ledger; the administrator is "
            "alarmed by mail when mail.admin is set)",
            run_id,
            time.monotonic() - started,
            _first_line(exc),
        )
    except Exception:
        log.exception("run %s failed with an unexpected error", run_id)
    else:
        if outcome.status == "skipped":
            log.info("run %s skipped: the slot already has a run (a double fire)", run_id)
        else:
            digests = len(outcome.digests)
            alerts = 0 if outcome.result is None else len(outcome.result.alerts)
            period = "-" if outcome.result is None else outcome.result.period
            log.info(
                "run %s %s in %.1f s: period %s, %d alerts, %d digests queued; delivery: %s",
                run_id,
                outcome.status,
                time.monotonic() - started,
                period,
                alerts,
                digests,
                delivery_counts(outcome.delivery),
            )
    upcoming = fire_after(trigger, clock())
    if upcoming is not None:
        log.info("next run at %s", _local(upcoming, zone))
    return outcome


def deliver_pending(
    config: Config, *, clock: Clock = now_utc, stopping: threading.Event | None = None
) -> list[DeliveryResult]:
    """Send what is due in the outbox (messages waiting for a retry). Never raises."""
    from digest.jobs import deliver_outbox

    if stopping is not None and stopping.is_set():
        return []  # what is due waits for the next start
    now = clock()
    try:
        with Ledger.open(config.ledger.url) as ledger:
            results = deliver_outbox(config, ledger, now)
    except DigestError as exc:
        log.error("delivery stopped: %s", _first_line(exc))
        return []
    except Exception:
        log.exception("delivery failed with an unexpected error")
        return []
    if results:
        log.info("delivery: %s", delivery_counts(results))
    return results


def delivery_counts(results: Sequence[DeliveryResult]) -> str:
    sent = sum(r.status == "sent" for r in results)
    later = sum(r.status == "failed_temporary" for r in results)
    failed = sum(r.status == "failed_permanent" for r in results)
    return f"{sent} sent, {later} kept for a retry, {failed} refused"


# ---- the daemon ------------------------------------------------------------------------------------


class _OneThread(BasePoolExecutor):
    """An APScheduler executor on a one-thread pool that we keep a handle on, so the main
    thread can wait for a running job after the scheduler stopped (:meth:`Daemon.run`)."""

    def __init__(self, name: str) -> None:
        self.pool = futures.ThreadPoolExecutor(1, thread_name_prefix=name)
        super().__init__(self.pool)


class Daemon:
    """The scheduler, its jobs and a stop flag. ``serve`` wraps it in the ledger lock and
    signal handlers; tests drive it directly (``trigger`` replaces the cron schedule)."""

    def __init__(
        self,
        config: Config,
        *,
        trigger: BaseTrigger | None = None,
        clock: Clock = now_utc,
        delivery_every: timedelta = DELIVERY_EVERY,
    ) -> None:
        schedule = config.schedule
        self.config = config
        self.trigger = trigger or make_trigger(schedule.cron, schedule.timezone)
        self.clock = clock
        self.delivery_every = delivery_every
        self.stopping = threading.Event()
        self._executors = {
            "default": _OneThread("digest-deliver"),
            "nightly": _OneThread("digest-run"),
        }
        self.scheduler = BlockingScheduler(executors=self._executors, timezone=UTC)
        self.scheduler.add_listener(self._on_start, EVENT_SCHEDULER_START)
        self.plan: StartPlan | None = None

    def prepare(self, ledger: Ledger, now: datetime) -> StartPlan:
        """Crash recovery and the start plan (hold ``ledger.lock(LOCK_NAME)``), then the jobs."""
        zone = zone_of(self.trigger)
        grace = timedelta(hours=self.config.schedule.grace_hours)
        abandoned = ledger.mark_abandoned_runs(now)
        for run_id in abandoned:
            log.warning("run %s was left running by a stopped process: marked failed", run_id)
        for item in ledger.outbox.recover_sending(now):
            log.warning(
                "message %s to %s (Message-ID %s) was being sent when the process stopped: "
                "queued again; it may arrive twice",
                item.id,
                item.recipient,
                item.message_id,
            )
        last = ledger.last_scheduled_run()
        retry = _retry_slot(ledger, abandoned, last)
        slot, reason = _decide(self.trigger, last, utc(now), grace, retry)
        self.plan = StartPlan(slot, fire_after(self.trigger, now))
        log.info("catch-up: %s", reason)
        self._add_jobs(now)
        if self.plan.next_fire is not None:
            log.info("next run at %s", _local(self.plan.next_fire, zone))
        return self.plan

    def _add_jobs(self, now: datetime) -> None:
        common = {
            "config": self.config,
            "trigger": self.trigger,
            "clock": self.clock,
            "stopping": self.stopping,
        }

        def add(func: Callable[..., Any], trigger: BaseTrigger, **options: Any) -> None:
            self.scheduler.add_job(func, trigger, coalesce=True, max_instances=1, **options)

        add(
            scheduled_run,
            self.trigger,
            id=NIGHTLY,
            executor="nightly",
            kwargs=common,
            misfire_grace_time=int(misfire_grace(self.config).total_seconds()),
        )
        if self.plan is not None and self.plan.catch_up is not None:
            add(
                scheduled_run,
                DateTrigger(run_date=now),
                id=CATCH_UP,
                executor="nightly",
                kwargs={**common, "slot": self.plan.catch_up},
                misfire_grace_time=None,  # queued at start: run it however late it starts
            )
        every = int(self.delivery_every.total_seconds())
        add(
            deliver_pending,
            IntervalTrigger(seconds=every, timezone=UTC),
            id=DELIVER,
            kwargs={"config": self.config, "clock": self.clock, "stopping": self.stopping},
            next_run_time=now,  # what is pending goes out at start
            misfire_grace_time=every,
        )

    def run(self) -> None:
        """Block until :meth:`stop`; then wait for a running job to finish."""
        try:
            self.scheduler.start()
        finally:
            if self.scheduler.running:  # start() left by an exception
                self.scheduler.shutdown(wait=False)
            for executor in self._executors.values():
                executor.pool.shutdown(wait=True)

    def stop(self, reason: str = "stop requested") -> None:
        """Ask the daemon to stop; safe from a signal handler and from another thread."""
        if self.stopping.is_set():
            log.warning("%s again: still waiting for the running job to finish", reason)
            return
        self.stopping.set()
        log.info("%s: stopping; a running job is allowed to finish", reason)
        self._shutdown()

    def _on_start(self, event: SchedulerEvent) -> None:
        if self.stopping.is_set():  # a signal arrived before the scheduler was running
            self._shutdown()

    def _shutdown(self) -> None:
        try:
            if self.scheduler.running:
                self.scheduler.shutdown(wait=False)  # never blocks in a signal handler
        except SchedulerNotRunningError:
            pass


def _retry_slot(ledger: Ledger, abandoned: list[str], last: datetime | None) -> datetime | None:
    """The latest slot whose run was just found interrupted before it queued any mail."""
    if not abandoned or last is None:
        return None
    records = {r.id: r for r in ledger.last_runs(len(abandoned) + 20)}
    for run_id in abandoned:
        record = records.get(run_id)
        if record is not None and record.scheduled_for == last:
            return None if _queued_mail(ledger, run_id) else last
    return None


def _queued_mail(ledger: Ledger, run_id: str) -> bool:
    query = sa.select(OUTBOX.c.id).where(OUTBOX.c.run_id == run_id).limit(1)
    with transaction(ledger.engine) as conn:
        return conn.execute(query).first() is not None


def serve(config: Config, *, trigger: BaseTrigger | None = None, clock: Clock = now_utc) -> int:
    """``digest serve``: run until SIGTERM or SIGINT; 0 after a clean stop.

    Raises ConfigError (exit 2) when the relay password variable is missing, LockHeld
    (exit 1, naming the other process) when another daemon holds the ledger.
    """
    if log.getEffectiveLevel() > logging.INFO:
        log.setLevel(logging.INFO)  # one line per event, also without -v
    check_relay(config.relay, config.relay.password())
    daemon = Daemon(config, trigger=trigger, clock=clock)
    schedule = config.schedule
    with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
        import digest.jobs  # noqa: F401  (a broken installation fails now, not at the first run)

        log.info(
            "digest daemon started: pid %d, config %s, ledger %s, schedule %r in %s, "
            "grace %s, delivery every %s",
            os.getpid(),
            config.source or "-",
            ledger.url,
            schedule.cron,
            schedule.timezone,
            _hours(timedelta(hours=schedule.grace_hours)),
            _hours(daemon.delivery_every),
        )
        with _signals(daemon.stop):
            daemon.prepare(ledger, clock())
            daemon.run()
    log.info("digest daemon stopped")
    return 0


@contextmanager
def _signals(stop: Callable[[str], None]) -> Iterator[None]:
    """SIGTERM and SIGINT call ``stop`` (main thread only; elsewhere nothing changes)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: FrameType | None) -> None:
        stop(signal.Signals(signum).name)

    previous: dict[int, Any] = {}
    for sig in (signal.SIGTERM, signal.SIGINT):
        previous[sig] = signal.signal(sig, handler)
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


# ---- wording ----------------------------------------------------------------------------------------


def _local(moment: datetime, zone: tzinfo) -> str:
    local = moment.astimezone(zone)
    utc_text = "" if local.utcoffset() == timedelta(0) else f" ({moment.astimezone(UTC):%H:%M} UTC)"
    return f"{local:%Y-%m-%d %H:%M %Z}{utc_text}"


def _hours(span: timedelta) -> str:
    minutes = span.total_seconds() / 60
    return f"{minutes / 60:g} h" if minutes >= 60 else f"{minutes:g} min"


def _first_line(exc: BaseException) -> str:
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__
