"""Faults an unattended daemon meets, tried with real parts: nothing lost, nothing twice.

Each test breaks something on purpose (the relay, the process, the input, the disk) and
then counts what reached a real aiosmtpd sink by Message-ID. External facts beside the
checks: RFC 5321 §4.2.1 (a 4yz reply is transient: the client tries again later; the
server has not taken the message), signal(7) (SIGKILL cannot be caught, so nothing in the
process runs: the ledger is what a power cut leaves).
"""

from __future__ import annotations

import asyncio
import os
import shutil
import signal
import threading
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
import test_daemon as shared  # the shared helpers at the top of test_daemon.py
from aiosmtpd.smtp import SMTP, Envelope, Session
from apscheduler.triggers.base import BaseTrigger
from test_daemon import (
    TLS,
    Process,
    daemon_running,
    delivered_to,
    message_ids,
    process_env,
    recipients,
    runs,
    seed_scheduled_run,
    settled,
    wait_until,
    write_config,
)

from digest.config import Config, load_config
from digest.daemon import LOCK_NAME, Daemon, latest_slot, scheduled_run, serve
from digest.jobs import deliver_outbox
from digest.ledger import Ledger
from digest.outbox import NewMessage
from digest.schedule import make_trigger
from digest.sink import MaildirHandler, Sink
from digest.status import status_report
from digest.testing import ScriptedHandler, free_port, make_message, read_maildir, running_sink

TRANSIENT = "451 4.3.0 try again later"  # RFC 5321 §4.2.1: 4yz, transient


@pytest.fixture(scope="session")
def demo_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return shared.demo_data_dir(tmp_path_factory)


@pytest.fixture(scope="session")
def tls(tmp_path_factory: pytest.TempPathFactory) -> TLS:
    return shared.tls_material(tmp_path_factory)


def owed_slot(config: Config) -> datetime:
    """The schedule's latest slot before now, owed because the ledger says yesterday ran."""
    trigger = make_trigger(config.schedule.cron, config.schedule.timezone)
    now = datetime.now(UTC)
    slot = latest_slot(trigger, now - timedelta(days=2), now)
    assert slot is not None
    seed_scheduled_run(config, slot - timedelta(days=1))
    return slot


def done(config: Config, count: int) -> bool:
    """``count`` runs, none still running, and the outbox settled."""
    found = runs(config)
    return len(found) == count and found[0].status != "running" and settled(config)


def serve_until(config: Config, done: Callable[[], Any], timeout: float = 60) -> int:
    """``serve(config)`` in this process's main thread, stopped by a real SIGTERM to this
    process once ``done()`` holds (or after ``timeout``)."""
    previous = signal.signal(signal.SIGTERM, lambda *args: None)  # a late one is harmless
    failure: list[BaseException] = []

    def watch() -> None:
        try:
            wait_until(done, timeout, "the restarted daemon to finish its work")
        except BaseException as exc:  # pytest.fail in a thread: report it in the test
            failure.append(exc)
        finally:
            os.kill(os.getpid(), signal.SIGTERM)

    watcher = threading.Thread(target=watch, name="test-watcher")
    watcher.start()
    try:
        code = serve(config)
    finally:
        watcher.join(timeout + 5)
        signal.signal(signal.SIGTERM, previous)
    if failure:
        raise failure[0]
    return code


class At(BaseTrigger):
    """Fires at the given times only (a schedule a test can see through)."""

    def __init__(self, *times: datetime) -> None:
        self.times = sorted(times)
        self.timezone = UTC

    def get_next_fire_time(
        self, previous_fire_time: datetime | None, now: datetime
    ) -> datetime | None:
        after = [t for t in self.times if t >= now]
        if previous_fire_time is not None:
            after = [t for t in after if t > previous_fire_time]
        return after[0] if after else None


# ---- the relay -----------------------------------------------------------------------------------


def queue_messages(config: Config, recipients: list[str], now: datetime) -> set[str]:
    """Digest-like messages in the outbox, as a run leaves them; returns their Message-IDs."""
    items = []
    for address in recipients:
        message = make_message(address, sender=config.mail.sender)
        items.append(
            NewMessage(
                id=f"run-1:digest:{address}",
                run_id="run-1",
                kind="digest",
                recipient=address,
                message_id=str(message["Message-ID"]),
                subject=str(message["Subject"]),
                message=message.as_bytes(policy=message.policy.clone(linesep="\r\n")),
            )
        )
    with Ledger.open(config.ledger.url) as ledger:
        ledger.outbox.enqueue(items, now)
    return {item.message_id for item in items}


def test_a_relay_down_then_refusing_then_up_gets_each_message_exactly_once(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    port = free_port()  # nothing listens there yet: the relay is down
    config = load_config(write_config(tmp_path, demo_data, port=port, ca_file=tls.ca_file))
    t0 = datetime(2026, 11, 2, 5, 31, tzinfo=UTC)
    addresses = [f"officer{i}@district.example.org" for i in range(6)]
    queued = queue_messages(config, addresses, t0)
    maildir = tmp_path / "maildir"
    handler = ScriptedHandler(maildir, rcpt_replies=[TRANSIENT, TRANSIENT])
    sink = Sink(handler=handler, host="127.0.0.1", port=port, tls_context=tls.server)
    with Ledger.open(config.ledger.url) as ledger:
        first = deliver_outbox(config, ledger, t0)  # connection refused: kept, none lost
        assert [r.status for r in first] == ["failed_temporary"] * len(addresses)
        assert ledger.outbox.depth().counts["pending"] == len(addresses)
        # [delivery] retry_first_minutes = 5 (default): nothing is due one minute later
        assert deliver_outbox(config, ledger, t0 + timedelta(minutes=1)) == []
        sink.start()  # the relay is back, but answers 4yz to the first two recipients
        try:
            second = deliver_outbox(config, ledger, t0 + timedelta(minutes=6))
            later = [r for r in second if r.status == "failed_temporary"]
            assert len(later) == 2 and all(r.code == 451 for r in later)
            assert sum(r.status == "sent" for r in second) == len(addresses) - 2
            # second failed try: the wait doubles to 10 minutes (due at 6 + 10 = 16)
            assert deliver_outbox(config, ledger, t0 + timedelta(minutes=15)) == []
            status_during, _ = status_report(config, t0 + timedelta(minutes=15))
            third = deliver_outbox(config, ledger, t0 + timedelta(minutes=17))
            assert [r.status for r in third] == ["sent", "sent"]
            assert deliver_outbox(config, ledger, t0 + timedelta(hours=5)) == []  # all done
        finally:
            sink.stop()
        assert ledger.outbox.depth().counts == {
            "pending": 0,
            "sending": 0,
            "sent": len(addresses),
            "failed": 0,
        }
    assert status_during  # waiting 15 minutes is within delivery.relay_alarm_minutes (60)
    ids = message_ids(maildir)
    assert set(ids) == {i.strip() for i in queued} and set(ids.values()) == {1}
    assert sorted(delivered_to(maildir)) == sorted(addresses)
    assert handler.data_calls == len(addresses)  # a refused RCPT never reached DATA


# ---- the process ---------------------------------------------------------------------------------


class Gate(MaildirHandler):
    """Holds the first DATA until released, then refuses it with a 4yz: the relay never
    took that message. Every later message is stored normally."""

    def __init__(self, maildir: Path) -> None:
        super().__init__(maildir)
        self.arrived = threading.Event()
        self.release = threading.Event()

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        if not self.arrived.is_set():
            self.arrived.set()
            while not self.release.is_set():
                await asyncio.sleep(0.02)
            return TRANSIENT
        return await super().handle_DATA(server, session, envelope)


def test_a_daemon_killed_between_outbox_and_relay_delivers_exactly_once_after_restart(
    tmp_path: Path, demo_data: Path, tls: TLS, caplog: pytest.LogCaptureFixture
) -> None:
    maildir = tmp_path / "maildir"
    gate = Gate(maildir)
    with running_sink(handler=gate, tls_context=tls.server) as sink:
        path = write_config(tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file)
        config = load_config(path)
        expected = recipients(config)
        slot = owed_slot(config)
        first = Process(path, process_env())
        try:
            wait_until(gate.arrived.is_set, 90, "the first daemon to reach the relay")
            with Ledger.open(config.ledger.url) as ledger:
                counts = ledger.outbox.depth().counts
            # Every digest is in the outbox and claimed by the sender; the relay took none.
            assert counts == {"pending": 0, "sending": len(expected), "sent": 0, "failed": 0}
            first.popen.send_signal(signal.SIGKILL)  # signal(7): cannot be caught
            first.kill()
        finally:
            first.kill()
            gate.release.set()
        assert first.popen.returncode == -signal.SIGKILL
        caplog.set_level("WARNING", logger="digest.daemon")
        assert serve_until(config, lambda: settled(config)) == 0
    ids = message_ids(maildir)
    assert sum(ids.values()) == len(expected) and set(ids.values()) == {1}
    assert sorted(delivered_to(maildir)) == sorted(expected)
    ours = [r for r in runs(config) if r.id != "seed"]
    assert [(r.status, r.scheduled_for) for r in ours] == [("succeeded", slot)]  # not re-run
    requeued = [r for r in caplog.records if "was being sent when the process stopped" in r.message]
    assert len(requeued) == len(expected)


def test_a_run_killed_before_it_queued_mail_is_run_again_at_start(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    maildir = tmp_path / "maildir"
    with running_sink(maildir, tls_context=tls.server) as sink:
        config = load_config(write_config(tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file))
        expected = recipients(config)
        slot = owed_slot(config)
        with Ledger.open(config.ledger.url) as ledger:  # what a SIGKILL in the pipeline leaves
            assert ledger.start_run("killed", slot + timedelta(seconds=2), scheduled_for=slot)
        daemon = Daemon(config)
        with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
            plan = daemon.prepare(ledger, datetime.now(UTC))
            assert plan.catch_up == slot
            with daemon_running(daemon):
                wait_until(lambda: done(config, 3), 60, "the catch-up run and its delivery")
    ours = {r.id: r for r in runs(config) if r.id != "seed"}
    assert (ours.pop("killed").status, len(ours)) == ("failed", 1)
    [again] = ours.values()
    assert (again.status, again.scheduled_for) == ("succeeded", slot)
    assert sorted(delivered_to(maildir)) == sorted(expected)
    assert set(message_ids(maildir).values()) == {1}


def test_a_run_killed_after_it_queued_mail_is_not_run_again_and_its_mail_goes_out_once(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    maildir = tmp_path / "maildir"
    with running_sink(maildir, tls_context=tls.server) as sink:
        config = load_config(write_config(tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file))
        slot = owed_slot(config)
        message = make_message("officer@district.example.org", sender=config.mail.sender)
        with Ledger.open(config.ledger.url) as ledger:
            assert ledger.start_run("killed", slot + timedelta(seconds=2), scheduled_for=slot)
            ledger.outbox.enqueue(
                [
                    NewMessage(
                        id="killed:digest:officer@district.example.org",
                        run_id="killed",
                        kind="digest",
                        recipient="officer@district.example.org",
                        message_id=str(message["Message-ID"]),
                        subject=str(message["Subject"]),
                        message=message.as_bytes(policy=message.policy.clone(linesep="\r\n")),
                    )
                ],
                slot + timedelta(seconds=3),
            )
        daemon = Daemon(config)
        with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
            plan = daemon.prepare(ledger, datetime.now(UTC))
            assert plan.catch_up is None  # a re-run would mail those alerts a second time
            with daemon_running(daemon):
                wait_until(lambda: settled(config), 30, "the pending message")
    assert [r.status for r in runs(config) if r.id != "seed"] == ["failed"]
    assert message_ids(maildir) == {str(message["Message-ID"]).strip(): 1}


# ---- the input and the disk ----------------------------------------------------------------------


def _vanish(values: Path) -> None:
    values.unlink()


def _corrupt(values: Path) -> None:
    values.write_bytes(b"\x00\x01 not a CSV \xff\xfe\n" * 50)


def _wrong_columns(values: Path) -> None:
    values.write_text("facility;indicator;month;count\nF1;anc1;2026-10;12\n", encoding="utf-8")


@pytest.mark.parametrize(
    ("fault", "stage"),
    [(_vanish, "load"), (_corrupt, "load"), (_wrong_columns, "load")],
    ids=["values file vanished", "values file corrupt", "values file with other columns"],
)
def test_a_bad_values_file_fails_the_run_with_an_alarm_and_the_job_returns(
    tmp_path: Path, demo_data: Path, tls: TLS, fault: Callable[[Path], None], stage: str
) -> None:
    values = tmp_path / "values.csv"
    shutil.copyfile(demo_data / "values.csv", values)
    maildir = tmp_path / "maildir"
    with running_sink(maildir, tls_context=tls.server) as sink:
        path = write_config(tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file, values=values)
        config = load_config(path)
        fault(values)  # after the daemon read its config, as an export job might do
        trigger = make_trigger(config.schedule.cron, config.schedule.timezone)
        slot = datetime(2026, 11, 2, 5, 30, tzinfo=UTC)
        assert scheduled_run(config, trigger, slot) is None  # logged, never raised
    [run] = runs(config)
    assert (run.status, run.scheduled_for) == ("failed", slot)
    [alarm] = read_maildir(maildir)
    assert str(alarm["To"]) == config.mail.admin
    assert str(alarm["Subject"]) == f"digest alarm: run {run.id} failed at stage {stage}"
    assert run.error and run.error.splitlines()[0] in alarm.get_content()


def test_an_unexpected_error_after_the_pipeline_is_recorded_and_alarmed(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    output = tmp_path / "out"
    output.write_text("a file where the output folder should be")  # mkdir fails (not root-only)
    maildir = tmp_path / "maildir"
    with running_sink(maildir, tls_context=tls.server) as sink:
        config = load_config(
            write_config(tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file, output=output)
        )
        trigger = make_trigger(config.schedule.cron, config.schedule.timezone)
        slot = datetime(2026, 11, 2, 5, 30, tzinfo=UTC)
        assert scheduled_run(config, trigger, slot) is None
    [run] = runs(config)
    # Not left 'running' (which would block the slot and stay silent until a restart).
    assert run.status == "failed" and run.error and "FileExistsError" in run.error
    [alarm] = read_maildir(maildir)
    assert str(alarm["Subject"]).startswith(f"digest alarm: run {run.id} failed")
    with Ledger.open(config.ledger.url) as ledger:
        assert ledger.outbox.depth().counts["pending"] == 0


def test_after_a_failed_run_the_daemon_keeps_serving_and_status_shows_both(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    values = tmp_path / "values.csv"
    maildir = tmp_path / "maildir"
    with running_sink(maildir, tls_context=tls.server) as sink:
        config = load_config(
            write_config(tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file, values=values)
        )
        expected = recipients(config)
        now = datetime.now(UTC).replace(microsecond=0)
        first, second = now + timedelta(seconds=1), now + timedelta(seconds=4)
        daemon = Daemon(config, trigger=At(first, second))
        with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
            assert daemon.prepare(ledger, now).catch_up is None  # a new installation
            with daemon_running(daemon):  # the values file is missing at the first slot
                wait_until(lambda: runs(config) and runs(config)[0].status == "failed", 30)
                unhealthy, _ = status_report(config, datetime.now(UTC))
                shutil.copyfile(demo_data / "values.csv", values)  # fixed before the second
                wait_until(lambda: done(config, 2), 60, "the second run and its delivery")
                healthy, lines = status_report(config, datetime.now(UTC))
    failed, succeeded = sorted(runs(config), key=lambda r: r.started_at)
    # Each run is labelled with the slot the job worked out from its trigger.
    assert (failed.status, failed.scheduled_for) == ("failed", first)
    assert (succeeded.status, succeeded.scheduled_for) == ("succeeded", second)
    to = delivered_to(maildir)
    assert to.pop(config.mail.admin) == 1  # the alarm for the first run
    assert sorted(to) == sorted(expected) and set(to.values()) == {1}
    assert set(message_ids(maildir).values()) == {1}
    assert not unhealthy  # the last run failed
    assert healthy, lines  # the last run succeeded, nothing stuck
    text = "\n".join(lines)
    assert f"daemon: running (pid {os.getpid()})" in text
    assert f"{succeeded.id}  succeeded" in text and f"{failed.id}  failed" in text
    assert f"0 pending, 0 sending, {len(expected) + 1} sent, 0 failed" in text
