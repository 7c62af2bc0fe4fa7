"""``digest status``: the health verdict (exit 0 / 1) and the lines an administrator scans.

Ledger states are built with the ledger's own API on a real SQLite file; "now" is passed in.
External facts: crontab(5) for the next run of ``30 5 * * *``; the IANA tz database for
Africa/Nairobi (EAT, UTC+3, no daylight saving time).
"""

from __future__ import annotations

import os
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest
import test_daemon as shared  # the shared helpers at the top of test_daemon.py
from test_daemon import TLS, write_config

from digest import pipeline, status
from digest.cli import build_parser
from digest.config import Config, load_config
from digest.daemon import LOCK_NAME
from digest.ledger import Ledger
from digest.outbox import NewMessage
from digest.status import status_report
from digest.testing import make_message

NOW = datetime(2026, 11, 2, 6, 0, tzinfo=UTC)  # 09:00 in Nairobi
SLOT = datetime(2026, 11, 2, 2, 30, tzinfo=UTC)  # 05:30 in Nairobi, today's slot


@pytest.fixture(scope="session")
def demo_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return shared.demo_data_dir(tmp_path_factory)


@pytest.fixture(scope="session")
def tls(tmp_path_factory: pytest.TempPathFactory) -> TLS:
    return shared.tls_material(tmp_path_factory)


@pytest.fixture
def config_path(tmp_path: Path, demo_data: Path, tls: TLS) -> Path:
    return write_config(
        tmp_path, demo_data, port=2525, ca_file=tls.ca_file, timezone="Africa/Nairobi"
    )


@pytest.fixture
def config(config_path: Path) -> Config:
    return load_config(config_path)


def record_run(
    config: Config,
    run_id: str,
    slot: datetime | None,
    status: str = "succeeded",
    error: str | None = None,
) -> None:
    started = (slot or NOW) + timedelta(seconds=3)
    with Ledger.open(config.ledger.url) as ledger:
        assert ledger.start_run(run_id, started, scheduled_for=slot)
        if status == "succeeded":
            times = {"evaluate": 2.25, "load": 3.5, "bands": 10.0, "rollup": 0.75}
            counts = {"rows_read": 123456, "alerts": 7, "digests": 3}
            ledger.finish_run(run_id, started, "succeeded", "2026-10", times, counts)
        elif status == "failed":
            ledger.finish_run(run_id, started, "failed", None, {}, {}, error=error)


def queue(config: Config, name: str, when: datetime) -> str:
    message = make_message(f"{name}@district.example.org")
    item = NewMessage(
        id=f"run:digest:{name}",
        run_id="run",
        kind="digest",
        recipient=f"{name}@district.example.org",
        message_id=str(message["Message-ID"]),
        subject=str(message["Subject"]),
        message=message.as_bytes(policy=message.policy.clone(linesep="\r\n")),
    )
    with Ledger.open(config.ledger.url) as ledger:
        ledger.outbox.enqueue([item], when)
    return item.id


def test_a_new_installation_is_healthy_and_shows_the_next_run(config: Config) -> None:
    healthy, lines = status_report(config, NOW)
    assert healthy, lines
    assert lines[0] == "digest status at 2026-11-02 09:00 EAT: healthy"
    # crontab(5) "30 5 * * *": 05:30 daily; Nairobi is UTC+3, so tomorrow 02:30 UTC.
    assert (
        "schedule: '30 5 * * *' in Africa/Nairobi; next run 2026-11-03 05:30 EAT (in 20 h 30 min)"
        in lines
    )
    assert "last runs: none yet" in lines
    assert "outbox: 0 pending, 0 sending, 0 sent, 0 failed; nothing pending" in lines
    assert "open alerts: none" in lines
    assert "daemon: not running (no process holds the daemon lock)" in lines


def test_a_succeeded_run_is_shown_with_its_stages_counts_and_alerts(config: Config) -> None:
    record_run(config, "20261102T023003-ab12", SLOT)
    alerts = pd.DataFrame(
        {
            "check": ["a", "b", "c"],
            "unit": ["F1", "F2", "F3"],
            "period": "2026-10",
            "kind": "bounds",
            "level": "facility",
            "severity": ["critical", "warning", "warning"],
            "programme": "maternal",
        }
    )
    with Ledger.open(config.ledger.url) as ledger:
        ledger.record_alerts("20261102T023003-ab12", SLOT, alerts, set())
        ledger.acknowledge(1, SLOT, "checked the register")
    healthy, lines = status_report(config, NOW)
    assert healthy, lines
    text = "\n".join(lines)
    assert (
        "  20261102T023003-ab12  succeeded  scheduled 2026-11-02 05:30 EAT  "
        "started 2026-11-02 05:30:03 EAT  pipeline 16 s  period 2026-10"
    ) in lines
    # in pipeline order, not the alphabetical order the ledger stores them in
    assert "      stages: load 3.5 s, bands 10.0 s, rollup 0.8 s, evaluate 2.2 s" in lines
    assert "      counts: alerts 7, digests 3, rows read 123,456" in lines
    assert "open alerts by severity:" in text
    assert "  critical       1  (0 new, 0 open, 1 acknowledged)" in lines
    assert "  warning        2  (2 new, 0 open, 0 acknowledged)" in lines
    assert text.index("critical") < text.index("warning")  # worst first


def test_the_stage_order_is_the_pipelines() -> None:
    assert status.STAGES == pipeline.STAGES


def test_the_last_run_failed(config: Config) -> None:
    record_run(config, "yesterday", SLOT - timedelta(days=1))
    record_run(config, "today", SLOT, "failed", "stage 'load' failed: values.csv: file not found")
    healthy, lines = status_report(config, NOW)
    assert not healthy
    assert lines[0].endswith(": needs attention")
    assert "  ! the last run today failed: stage 'load' failed: values.csv: file not found" in lines
    assert lines.index("      error: stage 'load' failed: values.csv: file not found") > 0
    record_run(config, "rerun", None)  # `digest run` by hand, after fixing the file
    healthy, lines = status_report(config, NOW + timedelta(minutes=5))
    assert healthy, lines
    assert any(line.startswith("  rerun  succeeded  scheduled by hand") for line in lines)


def test_mail_waiting_longer_than_the_relay_alarm_needs_attention(config: Config) -> None:
    record_run(config, "today", SLOT)
    queue(config, "ann", SLOT)
    limit = timedelta(minutes=config.delivery.relay_alarm_minutes)  # 60 by default
    healthy, lines = status_report(config, SLOT + limit)
    assert healthy, lines  # not longer than the limit yet
    assert (
        "outbox: 1 pending, 0 sending, 0 sent, 0 failed; oldest pending queued 60 min ago" in lines
    )
    healthy, lines = status_report(config, SLOT + limit + timedelta(minutes=1))
    assert not healthy
    assert any(line.startswith("  ! mail has waited 61 min in the outbox") for line in lines)


def test_a_failed_message_needs_attention_and_names_the_retry(config: Config) -> None:
    record_run(config, "today", SLOT)
    item = queue(config, "bob", SLOT)
    with Ledger.open(config.ledger.url) as ledger:
        assert ledger.outbox.claim(item, SLOT)
        ledger.outbox.mark_failed(item, SLOT, "550 5.1.1 no such user", 550)
    healthy, lines = status_report(config, NOW)
    assert not healthy
    assert (
        "  ! 1 message(s) could not be delivered; `digest outbox` lists them, "
        "`digest outbox --retry ID` sends one again"
    ) in lines
    assert f"  failed {item} to bob@district.example.org: 550 5.1.1 no such user" in lines


def test_a_slot_passed_without_a_run_means_the_daemon_is_not_running(config: Config) -> None:
    record_run(config, "yesterday", SLOT - timedelta(days=1))
    healthy, _ = status_report(config, SLOT + timedelta(minutes=59))  # may still be starting
    assert healthy
    healthy, lines = status_report(config, SLOT + timedelta(hours=2))
    assert not healthy
    assert (
        "  ! no run for the slot 2026-11-02 05:30 EAT (2 h 00 min ago): is the daemon running? "
        "(`systemctl status digest`)"
    ) in lines


def test_a_running_daemon_is_named_by_its_pid(config: Config) -> None:
    with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
        _, lines = status_report(config, NOW)
    assert f"daemon: running (pid {os.getpid()})" in lines


def test_exit_codes_of_digest_status(
    config_path: Path, config: Config, capsys: pytest.CaptureFixture[str]
) -> None:
    args = build_parser().parse_args(["status", "--config", str(config_path)])
    assert args.func(args) == 0  # no run yet
    assert "healthy" in capsys.readouterr().out.splitlines()[0]
    now = datetime.now(UTC)
    record_run(config, "failed", now - timedelta(minutes=1), "failed", "stage 'bands' failed")
    assert args.func(args) == 1
    assert capsys.readouterr().out.splitlines()[0].endswith("needs attention")
