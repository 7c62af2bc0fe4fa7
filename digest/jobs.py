"""The nightly job: the pipeline, then the ledger, routing, rendering, outbox and relay.

``run_job`` is what both ``digest run`` and the daemon call. It never reads the clock:
``now`` comes from the caller. Three ways to end a run:

- ``relay``: record alerts in the ledger, queue each digest in the outbox (before the relay
  is contacted), then deliver the outbox through the relay;
- ``dry-run``: render every current alert and hand the digests to the local test sink;
  the ledger is not touched, so a rehearsal changes nothing for the real run;
- ``preview``: write each digest as .eml, .html and .txt files; no SMTP, no ledger.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from email.message import EmailMessage
from pathlib import Path
from typing import Literal

import pandas as pd

from digest.alarms import admin_message
from digest.config import Config
from digest.deliver import DeliveryResult, Outgoing, deliver
from digest.errors import DeliveryError, DigestError, StageError
from digest.ledger import Ledger, due_for_digest, evaluated_scope
from digest.message import build_message, new_message_id
from digest.outbox import Backoff, NewMessage, Outbox, OutboxItem
from digest.outputs import write_atomic, write_outputs
from digest.pipeline import Progress, RunResult, new_run_id, run_pipeline
from digest.recipients import Recipient, load_recipients
from digest.render import DigestContext, RenderedDigest, make_environment, render_digest
from digest.route import route

log = logging.getLogger("digest.jobs")
Mode = Literal["relay", "dry-run", "preview"]


@dataclass
class Prepared:
    """One recipient's digest, rendered and built, ready for the outbox or a file."""

    recipient: Recipient
    alerts: pd.DataFrame
    rendered: RenderedDigest
    message: EmailMessage
    outbox_id: str


@dataclass
class JobOutcome:
    run_id: str
    status: Literal["succeeded", "failed", "skipped"]
    result: RunResult | None = None
    digests: list[Prepared] = field(default_factory=list)
    unrouted: pd.DataFrame | None = None
    delivery: list[DeliveryResult] = field(default_factory=list)
    files: dict[str, Path] = field(default_factory=dict)
    maildir: Path | None = None
    error: str | None = None


def run_job(
    config: Config,
    *,
    now: datetime,
    mode: Mode = "relay",
    as_of: str | None = None,
    scheduled_for: datetime | None = None,
    out_dir: Path | None = None,
    preview_dir: Path | None = None,
    progress: Progress | None = None,
    sleep: Callable[[float], None] | None = None,
    run_id: str | None = None,
    clock: Callable[[], datetime] | None = None,
) -> JobOutcome:
    """``now`` is the run's start; ``clock`` (the CLI and the daemon pass the real one) gives
    the finish time recorded in the ledger, else the finish is recorded as ``now``."""
    run_id = run_id or new_run_id(now)  # the daemon passes one, to log it on every line
    finished = clock or (lambda: now)
    out_dir = out_dir or config.output.dir
    if mode != "relay":
        return _rehearse(config, run_id, now, mode, as_of, out_dir, preview_dir, progress)
    with Ledger.open(config.ledger.url) as ledger:
        if not ledger.start_run(run_id, now, scheduled_for=scheduled_for):
            log.warning("run for the slot %s already done or running; skipped", scheduled_for)
            return JobOutcome(run_id, "skipped")
        try:
            outcome = _record_and_queue(
                config, ledger, run_id, now, as_of, out_dir, progress, finished
            )
        except Exception as exc:  # any failure, expected or not: never leave it 'running'
            _fail(config, ledger, run_id, now, exc, finished())
            deliver_outbox(config, ledger, now, sleep=sleep)
            raise
        outcome.delivery = deliver_outbox(config, ledger, now, sleep=sleep)
        return outcome


def _record_and_queue(
    config: Config,
    ledger: Ledger,
    run_id: str,
    now: datetime,
    as_of: str | None,
    out_dir: Path,
    progress: Progress | None,
    finished: Callable[[], datetime],
) -> JobOutcome:
    result = run_pipeline(config, run_id=run_id, as_of=as_of, progress=progress)
    files = write_outputs(result, out_dir)
    tracked = ledger.record_alerts(
        run_id, now, result.alerts, evaluated_scope(config, result.period)
    )
    due = _new_first(due_for_digest(tracked, now, config.mail.remind_every_days))
    recipients = _recipients(config, result)
    routing = route(due, recipients, result.hierarchy)
    resolved = _resolved_lookup(ledger, result, now)
    prepared = prepare_digests(config, result, routing.bundles, now, resolved)
    items = [_outbox_entry(p, run_id) for p in prepared]
    summary = _summary_message(config, result, prepared, routing.unrouted, now)
    ledger.outbox.enqueue([*items, *([summary] if summary else [])], now)
    notified = {int(i) for p in prepared for i in p.alerts.get("alert_id", [])}
    ledger.mark_notified(notified, now)
    for p in prepared:
        ledger.set_last_digest(p.recipient.email, now)
    counts = {
        "rows_read": result.loaded.stats.rows_read,
        "rows_rejected": result.loaded.stats.rows_rejected,
        "alerts": len(result.alerts),
        "due": len(due),
        "digests": len(prepared),
        "unrouted": len(routing.unrouted),
    }
    ledger.finish_run(run_id, finished(), "succeeded", result.period, result.timings, counts)
    return JobOutcome(run_id, "succeeded", result, prepared, routing.unrouted, files=files)


def _fail(
    config: Config, ledger: Ledger, run_id: str, now: datetime, exc: Exception, end: datetime
) -> None:
    if isinstance(exc, DigestError):
        stage, error = (exc.stage if isinstance(exc, StageError) else "load"), str(exc)
    else:  # a bug or the system (disk, database) after the pipeline: outputs, ledger, mail
        stage, error = "digests", f"{type(exc).__name__}: {exc}"
    ledger.finish_run(run_id, end, "failed", None, {}, {}, error=error)
    log.error("run %s failed: %s", run_id, error)
    alarm = admin_message(
        config.mail,
        outbox_id=f"{run_id}:alarm:stage",
        run_id=run_id,
        kind="alarm",
        subject=f"digest alarm: run {run_id} failed at stage {stage}",
        body=(
            f"The nightly run {run_id} failed at stage '{stage}'. The stages after it did not "
            f"run and no digests were queued.\n\n{error}\n\nFix the cause, then run "
            "`digest run --config ...` by hand or wait for the next scheduled run."
        ),
        now=now,
    )
    if alarm:
        ledger.outbox.enqueue([alarm], now)


# ---- rendering ---------------------------------------------------------------------------


def _recipients(config: Config, result: RunResult) -> list[Recipient]:
    if config.mail.recipients is None:
        return []
    programmes = {c.programme for c in config.check}
    return load_recipients(config.mail.recipients, result.hierarchy, programmes)


def _new_first(due: pd.DataFrame) -> pd.DataFrame:
    """New and reopened alerts before reminders; worst first within each (stable sort)."""
    rank = due["reason"].map({"new": 0, "reopened": 0, "reminder": 1}).fillna(1)
    return due.assign(_rank=rank).sort_values("_rank", kind="stable").drop(columns="_rank")


ResolvedLookup = Callable[[Recipient], pd.DataFrame]


def _resolved_lookup(ledger: Ledger, result: RunResult, now: datetime) -> ResolvedLookup:
    """For a recipient: alerts in their reach resolved since their last digest."""
    hierarchy = result.hierarchy

    def lookup(recipient: Recipient) -> pd.DataFrame:
        since = ledger.last_digest_at(recipient.email)
        if since is None:
            return pd.DataFrame()
        resolved = ledger.resolved_between(since, now)
        known = resolved["unit"].isin(hierarchy.index.keys()) if len(resolved) else []
        resolved = resolved[known]
        if resolved.empty:
            return resolved
        resolved = resolved.assign(
            unit_index=[hierarchy.index[u] for u in resolved["unit"]], score=0.0
        )
        return route(resolved, [recipient], hierarchy).bundles[0].alerts

    return lookup


def prepare_digests(
    config: Config,
    result: RunResult,
    bundles: Sequence,
    now: datetime,
    resolved_for: ResolvedLookup | None = None,
) -> list[Prepared]:
    """Render and build one message per recipient with something to say (alerts, or
    resolved alerts since their last digest), or an all-clear note when configured."""
    env = make_environment(config.mail.templates)
    context = DigestContext(
        run_id=result.run_id,
        period=result.period,
        generated_at=now,
        hierarchy=result.hierarchy,
        mail=config.mail,
        history=lambda metric, unit, band, period, count: result.history(unit, metric, band, count),
    )
    prepared = []
    for bundle in bundles:
        recipient = bundle.recipient
        resolved = resolved_for(recipient) if resolved_for else None
        quiet = bundle.alerts.empty and (resolved is None or resolved.empty)
        if quiet and not config.mail.all_clear:
            continue
        rendered = render_digest(bundle.alerts, recipient, context, env, resolved)
        outbox_id = f"{result.run_id}:digest:{recipient.email}"
        message = build_message(
            rendered,
            to_name=recipient.name,
            to_addr=recipient.email,
            mail=config.mail,
            run_id=result.run_id,
            now=now,
            message_id=new_message_id(result.run_id, config.mail.domain),
        )
        prepared.append(Prepared(recipient, bundle.alerts, rendered, message, outbox_id))
    return prepared


def _outbox_entry(prepared: Prepared, run_id: str) -> NewMessage:
    msg = prepared.message
    return NewMessage(
        id=prepared.outbox_id,
        run_id=run_id,
        kind="digest",
        recipient=prepared.recipient.email,
        message_id=str(msg["Message-ID"]).strip(),
        subject=str(msg["Subject"]),
        message=msg.as_bytes(policy=msg.policy.clone(linesep="\r\n")),
    )


def _summary_message(
    config: Config,
    result: RunResult,
    prepared: list[Prepared],
    unrouted: pd.DataFrame,
    now: datetime,
) -> NewMessage | None:
    if not config.mail.run_summary:
        return None
    from digest.summary import summary_lines

    lines = summary_lines(result)
    lines.append("")
    lines.append(f"digests queued: {len(prepared)}")
    lines += [f"  {p.recipient.email:<40} {len(p.alerts):>4} alerts" for p in prepared]
    lines.append(f"alerts that reach nobody: {len(unrouted)}")
    lines += [
        f"  {r.check} at {r.unit} ({r.unit_name}), {r.level}, {r.severity}"
        for r in unrouted.head(50).itertuples()
    ]
    return admin_message(
        config.mail,
        outbox_id=f"{result.run_id}:summary",
        run_id=result.run_id,
        kind="summary",
        subject=f"digest run {result.run_id}: {len(result.alerts)} alerts, period {result.period}",
        body="\n".join(lines),
        now=now,
    )


# ---- delivery ----------------------------------------------------------------------------


def deliver_outbox(
    config: Config,
    ledger: Ledger,
    now: datetime,
    *,
    sleep: Callable[[float], None] | None = None,
) -> list[DeliveryResult]:
    """Send what is due in the outbox through the relay; alarm on give-ups and failures."""
    outbox = ledger.outbox
    backoff = Backoff(
        base=timedelta(minutes=config.delivery.retry_first_minutes),
        cap=timedelta(minutes=config.delivery.retry_max_minutes),
    )
    expired = outbox.give_up_expired(now, timedelta(hours=config.delivery.give_up_hours))
    for item in expired:
        _alarm_for(config, ledger, item, now, "given up after retrying")
    claimed = [item for item in outbox.due(now, limit=1000) if outbox.claim(item.id, now)]
    if not claimed:
        return []
    by_id = {item.id: item for item in claimed}
    outgoing = [
        Outgoing(item.id, config.mail.sender, item.recipient, _stored(outbox, item))
        for item in claimed
    ]

    def record(result: DeliveryResult) -> None:
        if result.status == "sent":
            outbox.mark_sent(result.id, now, result.code)
        elif result.status == "failed_permanent":
            outbox.mark_failed(result.id, now, result.error or "refused", result.code)
            _alarm_for(config, ledger, by_id[result.id], now, result.error or "refused")
        else:
            outbox.mark_retry(result.id, now, result.error or "not sent", result.code, backoff)

    kwargs = {"sleep": sleep} if sleep else {}
    try:
        results = deliver(
            outgoing, config.relay, password=config.relay.password(), on_result=record, **kwargs
        )
    except DeliveryError as exc:
        log.error("relay refused the configuration: %s", exc)
        _relay_alarm(config, ledger, now, str(exc))
        return []
    _check_relay_down(config, ledger, now)
    return results


def _stored(outbox: Outbox, item: OutboxItem) -> bytes:
    return outbox.get(item.id).message


def _alarm_for(config: Config, ledger: Ledger, item: OutboxItem, now: datetime, why: str) -> None:
    if item.kind != "digest":
        return  # never alarm about an alarm: it would loop
    alarm = admin_message(
        config.mail,
        outbox_id=f"alarm:failed:{item.id}",
        run_id=item.run_id,
        kind="alarm",
        subject=f"digest alarm: a digest to {item.recipient} could not be delivered",
        body=(
            f"The digest {item.id} to {item.recipient} was not delivered: {why}.\n"
            f"`digest outbox` lists it; `digest outbox --retry {item.id}` queues it again."
        ),
        now=now,
    )
    if alarm:
        ledger.outbox.enqueue([alarm], now)


def _relay_alarm(config: Config, ledger: Ledger, now: datetime, why: str) -> None:
    alarm = admin_message(
        config.mail,
        outbox_id=f"alarm:relay:{now:%Y-%m-%d}",
        run_id="relay",
        kind="alarm",
        subject="digest alarm: the relay refuses our settings",
        body=f"Delivery stopped: {why}\nMessages stay in the outbox until this is fixed.",
        now=now,
    )
    if alarm:
        ledger.outbox.enqueue([alarm], now)


def _check_relay_down(config: Config, ledger: Ledger, now: datetime) -> None:
    depth = ledger.outbox.depth()
    oldest = depth.oldest_pending
    limit = timedelta(minutes=config.delivery.relay_alarm_minutes)
    if oldest is not None and now - oldest > limit:
        _relay_alarm(
            config,
            ledger,
            now,
            f"mail has waited in the outbox since {oldest:%Y-%m-%d %H:%M} UTC "
            f"(longer than {config.delivery.relay_alarm_minutes:g} minutes)",
        )


# ---- rehearsals --------------------------------------------------------------------------


def _rehearse(
    config: Config,
    run_id: str,
    now: datetime,
    mode: Mode,
    as_of: str | None,
    out_dir: Path,
    preview_dir: Path | None,
    progress: Progress | None,
) -> JobOutcome:
    result = run_pipeline(config, run_id=run_id, as_of=as_of, progress=progress)
    files = write_outputs(result, out_dir)
    due = result.alerts.assign(reason="new")
    routing = route(due, _recipients(config, result), result.hierarchy)
    prepared = prepare_digests(config, result, routing.bundles, now)
    outcome = JobOutcome(run_id, "succeeded", result, prepared, routing.unrouted, files=files)
    if mode == "preview":
        outcome.files.update(write_previews(prepared, preview_dir or out_dir / "preview"))
        return outcome
    from digest.sink import ensure_sink

    with ensure_sink(config.sink) as endpoint:
        outgoing = [
            Outgoing(p.outbox_id, config.mail.sender, p.recipient.email, p.message)
            for p in prepared
        ]
        outcome.delivery = deliver(outgoing, endpoint.relay_config(), password=None)
        outcome.maildir = endpoint.maildir
    return outcome


def write_previews(prepared: Sequence[Prepared], folder: Path) -> dict[str, Path]:
    """Each digest as <address>.eml, .html and .txt in ``folder``."""
    written: dict[str, Path] = {}
    for p in prepared:
        stem = p.recipient.email.replace("@", "_at_")
        msg_bytes = p.message.as_bytes(policy=p.message.policy.clone(linesep="\r\n"))
        for suffix, data in (
            (".eml", msg_bytes),
            (".html", p.rendered.html.encode()),
            (".txt", p.rendered.text.encode()),
        ):
            path = folder / f"{stem}{suffix}"
            write_atomic(path, lambda fh, data=data: fh.write(data))
            written[f"{stem}{suffix}"] = path
    return written


def default_now() -> datetime:
    """The only place a job reads the clock (called by the CLI and the daemon)."""
    from datetime import UTC

    return datetime.now(UTC)
