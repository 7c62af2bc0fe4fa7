"""``digest status``: what an administrator checks on the server, in lines to scan.

Healthy (exit 0) when all of these hold, otherwise exit 1 with a "needs attention" line
per problem at the top:

- the last run succeeded (or there is no run yet);
- no outbox message has failed (``digest outbox`` lists them, ``--retry ID`` resends);
- no message has waited longer than ``delivery.relay_alarm_minutes``;
- no scheduled slot passed more than ``OVERDUE`` ago without a run, when the ledger has
  scheduled runs at all (i.e. a daemon is meant to be running).

The clock is passed in (``now``); only the CLI reads it.
"""

from __future__ import annotations

import socket
from datetime import datetime, timedelta, tzinfo
from zoneinfo import ZoneInfo

from digest.config import Config
from digest.daemon import LOCK_NAME, fire_after
from digest.ledger import Ledger, LockHeld, RunRecord
from digest.ledger_db import utc
from digest.outbox import STATUSES, OutboxDepth, OutboxItem
from digest.schedule import make_trigger

RUNS_SHOWN = 5
FAILED_SHOWN = 5
# digest.pipeline.STAGES, spelt out: importing the pipeline would make this probe heavy
# (pandas, scipy, matplotlib). tests/test_status.py checks the two agree.
STAGES = ("load", "bands", "rollup", "evaluate")
OVERDUE = timedelta(hours=1)  # a slot this long past with no run: the daemon is not running


def status_report(config: Config, now: datetime) -> tuple[bool, list[str]]:
    """(healthy, lines): the state of runs, schedule, outbox and alerts at ``now``."""
    now = utc(now)
    schedule = config.schedule
    zone = ZoneInfo(schedule.timezone)
    trigger = make_trigger(schedule.cron, schedule.timezone)
    with Ledger.open(config.ledger.url) as ledger:
        daemon = _daemon_state(ledger)
        runs = ledger.last_runs(RUNS_SHOWN)
        last_scheduled = ledger.last_scheduled_run()
        depth = ledger.outbox.depth()
        failed = ledger.outbox.list("failed", limit=FAILED_SHOWN) if depth.counts["failed"] else []
        alerts = ledger.open_alerts_by_severity()
        url = ledger.url

    problems: list[str] = []
    if runs and runs[0].status == "failed":
        problems.append(f"the last run {runs[0].id} failed: {_first_line(runs[0].error)}")
    if depth.counts["failed"]:
        problems.append(
            f"{depth.counts['failed']} message(s) could not be delivered; `digest outbox` "
            "lists them, `digest outbox --retry ID` sends one again"
        )
    limit = timedelta(minutes=config.delivery.relay_alarm_minutes)
    if depth.oldest_pending is not None and now - depth.oldest_pending > limit:
        problems.append(
            f"mail has waited {_age(now - depth.oldest_pending)} in the outbox (alarm after "
            f"{_age(limit)}): is the relay reachable? the log says why each try failed"
        )
    if last_scheduled is not None:
        overdue = fire_after(trigger, last_scheduled)  # the first slot with no run
        if overdue is not None and now - overdue > OVERDUE:
            problems.append(
                f"no run for the slot {_when(overdue, zone)} ({_age(now - overdue)} ago): "
                "is the daemon running? (`systemctl status digest`)"
            )

    lines = [
        f"digest status at {_when(now, zone)}: " + ("needs attention" if problems else "healthy")
    ]
    lines += [f"  ! {p}" for p in problems]
    lines.append(f"ledger: {url}")
    lines.append(f"daemon: {daemon}")
    upcoming = fire_after(trigger, now)
    lines.append(
        f"schedule: {schedule.cron!r} in {schedule.timezone}; next run "
        + (f"{_when(upcoming, zone)} (in {_age(upcoming - now)})" if upcoming else "never")
    )
    lines += _run_lines(runs, zone, now)
    lines += _outbox_lines(depth, failed, now)
    lines += _alert_lines(alerts)
    return not problems, lines


def _daemon_state(ledger: Ledger) -> str:
    try:
        with ledger.lock(LOCK_NAME):
            return "not running (no process holds the daemon lock)"
    except LockHeld as held:
        who = "pid unknown" if held.pid is None else f"pid {held.pid}"
        if held.host and held.host != socket.gethostname():
            who += f" on {held.host}"
        return f"running ({who})"


def _run_lines(runs: list[RunRecord], zone: tzinfo, now: datetime) -> list[str]:
    if not runs:
        return ["last runs: none yet"]
    lines = [f"last runs (newest first, times in {_zone_name(zone)}):"]
    for run in runs:
        slot = _when(run.scheduled_for, zone) if run.scheduled_for else "by hand"
        if run.status == "running":
            took = f"running for {_age(now - run.started_at)}"
        elif run.stage_times:  # run_job stamps start and finish with the one "now" it is given
            took = f"pipeline {_age(timedelta(seconds=sum(run.stage_times.values())))}"
        else:
            took = f"ended {_when(run.finished_at, zone)}" if run.finished_at else ""
        lines.append(
            f"  {run.id}  {run.status:<9}  scheduled {slot}  started "
            f"{_when(run.started_at, zone, seconds=True)}  {took}  period {run.period or '-'}"
        )
        if run.stage_times:
            order = {name: i for i, name in enumerate(STAGES)}
            named = sorted(run.stage_times.items(), key=lambda kv: (order.get(kv[0], 99), kv[0]))
            lines.append("      stages: " + ", ".join(f"{k} {v:.1f} s" for k, v in named))
        if run.counts:
            counts = ", ".join(f"{k.replace('_', ' ')} {v:,}" for k, v in run.counts.items())
            lines.append(f"      counts: {counts}")
        if run.error:
            lines.append(f"      error: {_first_line(run.error)}")
    return lines


def _outbox_lines(depth: OutboxDepth, failed: list[OutboxItem], now: datetime) -> list[str]:
    counts = ", ".join(f"{depth.counts[s]} {s}" for s in STATUSES)
    oldest = (
        "nothing pending"
        if depth.oldest_pending is None
        else f"oldest pending queued {_age(now - depth.oldest_pending)} ago"
    )
    lines = [f"outbox: {counts}; {oldest}"]
    for item in failed:
        lines.append(f"  failed {item.id} to {item.recipient}: {_first_line(item.last_error)}")
    return lines


def _alert_lines(alerts: dict[str, dict[str, int]]) -> list[str]:
    if not alerts:
        return ["open alerts: none"]
    lines = ["open alerts by severity:"]
    for severity, states in alerts.items():
        detail = ", ".join(f"{n} {state}" for state, n in states.items())
        lines.append(f"  {severity:<9} {sum(states.values()):>6}  ({detail})")
    return lines


def _when(moment: datetime, zone: tzinfo, *, seconds: bool = False) -> str:
    shown = "%Y-%m-%d %H:%M:%S %Z" if seconds else "%Y-%m-%d %H:%M %Z"
    return moment.astimezone(zone).strftime(shown)


def _zone_name(zone: tzinfo) -> str:
    return str(getattr(zone, "key", zone))


def _age(span: timedelta) -> str:
    if span.total_seconds() < 10:
        return f"{max(span.total_seconds(), 0):.1f} s"
    seconds = int(span.total_seconds())
    if seconds < 120:
        return f"{seconds} s"
    minutes = seconds // 60
    if minutes < 120:
        return f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    if hours < 48:
        return f"{hours} h {minutes:02d} min"
    return f"{hours // 24} d {hours % 24} h"


def _first_line(text: str | None) -> str:
    return (text or "").strip().splitlines()[0] if (text or "").strip() else "-"
