"""``digest serve``: the schedule as pure functions, and the daemon with real parts.

Real parts: the demo data set (generated once per session, smaller than ``digest demo``'s),
a copy of ``demo/config.toml`` written as TOML, a SQLite ledger, aiosmtpd sinks on free
loopback ports with STARTTLS and a trustme CA, and ``digest serve`` as a process.
External facts beside the checks: crontab(5) for what an expression means, cron(8) (Vixie
cron) for the repeated hour of a DST fall-back, the IANA tz database (through zoneinfo)
for the offsets, RFC 5321 §4.2.1 for transient 4yz replies. The shared helpers at the top
are imported by test_faults.py and test_status.py.
"""

from __future__ import annotations

import json
import os
import signal
import ssl
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
import trustme

from digest import demo_data as demo_generator
from digest.config import Config, load_config
from digest.daemon import (
    CATCH_UP,
    DELIVER,
    LOCK_NAME,
    NIGHTLY,
    Daemon,
    StartPlan,
    fire_after,
    latest_slot,
    plan_start,
    repeated_hour,
    serve,
)
from digest.errors import ConfigError
from digest.ledger import Ledger, RunRecord
from digest.schedule import make_trigger
from digest.testing import read_maildir, running_sink

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "demo" / "config.toml"
USER = "digest"
PASSWORD = "relay-Secret-4c1d-never-logged"  # distinctive, so a leak is easy to find
PASSWORD_ENV = "DIGEST_TEST_RELAY_PASSWORD"
PEOPLE = 4  # recipients per test config: what is tested does not grow with them

# ---- shared helpers (also used by test_faults.py and test_status.py) -----------------------------

_CACHE: dict[str, Any] = {}  # one demo data set and one CA per session, whichever module asks


@dataclass(frozen=True)
class TLS:
    server: ssl.SSLContext  # the sink's certificate for 127.0.0.1, issued by a trustme CA
    ca_file: Path  # that CA, for the client (relay.ca_file)


def demo_data_dir(factory: pytest.TempPathFactory) -> Path:
    """The demo data set (units, values, recipients), generated once per session."""
    if "data" not in _CACHE:
        folder = factory.mktemp("demo-data")
        demo_generator.generate(folder, facilities=144, months=28)
        _CACHE["data"] = folder
    return _CACHE["data"]


def tls_material(factory: pytest.TempPathFactory) -> TLS:
    if "tls" not in _CACHE:
        ca = trustme.CA()
        server = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ca.issue_cert("localhost", "127.0.0.1").configure_cert(server)
        ca_file = factory.mktemp("ca") / "ca.pem"
        ca.cert_pem.write_to_path(str(ca_file))
        _CACHE["tls"] = TLS(server, ca_file)
    return _CACHE["tls"]


@pytest.fixture(scope="session")
def demo_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return demo_data_dir(tmp_path_factory)


@pytest.fixture(scope="session")
def tls(tmp_path_factory: pytest.TempPathFactory) -> TLS:
    return tls_material(tmp_path_factory)


def write_config(
    folder: Path,
    data: Path,
    *,
    port: int,
    ca_file: Path,
    cron: str = "30 5 * * *",
    timezone: str = "UTC",
    grace_hours: float = 25,
    values: Path | None = None,
    output: Path | None = None,
    auth: bool = False,
    attempts: int = 1,
    people: int = PEOPLE,
) -> Path:
    """A copy of demo/config.toml in ``folder``: data from ``data``, the first ``people``
    recipients, relay at ``port`` with STARTTLS, a ledger file in ``folder``, no charts
    (speed). Returns the file's path."""
    folder.mkdir(parents=True, exist_ok=True)
    lines = (data / "recipients.csv").read_text(encoding="utf-8").splitlines(keepends=True)
    (folder / "recipients.csv").write_text("".join(lines[: people + 1]), encoding="utf-8")
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    text = text[: text.index("\n[relay]")]  # keep data, metrics, bands, checks and [mail]
    text = text.replace('recipients = "data/', f'recipients = "{folder}/')
    text = text.replace('"data/', f'"{data}/')
    if values is not None:
        text = text.replace(f'values = "{data}/values.csv"', f'values = "{values}"')
    text = text.replace("\ncharts = 10 ", "\ncharts = 0 ")
    login = f'username = "{USER}"\npassword_env = "{PASSWORD_ENV}"\n' if auth else ""
    text += f"""
[relay]
host = "127.0.0.1"
port = {port}
security = "starttls"
ca_file = "{ca_file}"
timeout = 5
attempts = {attempts}
backoff = 0
local_hostname = "client.digest.test"
{login}
[output]
dir = "{output or folder / "out"}"

[schedule]
cron = "{cron}"
timezone = "{timezone}"
grace_hours = {grace_hours}

[ledger]
url = "sqlite:///ledger.sqlite"
"""
    path = folder / "digest.toml"
    path.write_text(text, encoding="utf-8")
    return path


def recipients(config: Config) -> list[str]:
    """The addresses in the config's recipients file (every one gets a digest: all_clear)."""
    assert config.mail.recipients is not None
    lines = config.mail.recipients.read_text(encoding="utf-8").splitlines()[1:]
    return [line.split(",")[0] for line in lines if line.strip()]


def message_ids(maildir: Path) -> Counter[str]:
    """How often each Message-ID arrived in the sink's Maildir."""
    if not (maildir / "new").is_dir():
        return Counter()
    return Counter(str(m["Message-ID"]).strip() for m in read_maildir(maildir))


def delivered_to(maildir: Path) -> Counter[str]:
    if not (maildir / "new").is_dir():
        return Counter()
    return Counter(str(m["To"]).split("<")[-1].strip(">") for m in read_maildir(maildir))


def wait_until(check: Callable[[], Any], timeout: float = 30, what: str = "") -> Any:
    deadline = time.monotonic() + timeout
    while True:
        value = check()
        if value:
            return value
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout} s waiting for {what or check}")
        time.sleep(0.02)


def runs(config: Config) -> list[RunRecord]:
    with Ledger.open(config.ledger.url) as ledger:
        return ledger.last_runs(50)


def settled(config: Config) -> bool:
    """The outbox has sent something and nothing is waiting or being sent."""
    with Ledger.open(config.ledger.url) as ledger:
        counts = ledger.outbox.depth().counts
    return counts["sent"] > 0 and counts["pending"] == 0 and counts["sending"] == 0


def seed_scheduled_run(config: Config, slot: datetime) -> None:
    """The ledger as a daemon leaves it after a successful run for ``slot``."""
    with Ledger.open(config.ledger.url) as ledger:
        assert ledger.start_run("seed", slot, scheduled_for=slot)
        ledger.finish_run("seed", slot, "succeeded", "2026-09", {}, {})


@contextmanager
def daemon_running(daemon: Daemon) -> Iterator[threading.Thread]:
    """A prepared Daemon's scheduler in a thread, stopped and joined when the block ends."""
    thread = threading.Thread(target=daemon.run, name="test-daemon")
    thread.start()
    try:
        yield thread
    finally:
        daemon.stop("end of test")
        thread.join(30)
    assert not thread.is_alive(), "the daemon did not stop"


def utc(*args: int) -> datetime:
    return datetime(*args, tzinfo=UTC)  # type: ignore[misc]


# ---- plan_start: pure, "now" injected ----------------------------------------------------


def test_after_an_outage_only_the_latest_missed_slot_is_run() -> None:
    # crontab(5): "30 5 * * *" is 05:30 every day. Africa/Nairobi is UTC+3 all year (IANA
    # tz database), so 05:30 there is 02:30 UTC.
    trigger = make_trigger("30 5 * * *", "Africa/Nairobi")
    last = utc(2026, 10, 29, 2, 30)  # the run of 29 October; down from the 30th to the 2nd
    now = utc(2026, 11, 2, 9, 0)
    plan = plan_start(trigger, last, now, timedelta(hours=24))
    assert plan == StartPlan(utc(2026, 11, 2, 2, 30), utc(2026, 11, 3, 2, 30))
    catch_up, _ = plan  # a plain pair
    assert catch_up is not None and catch_up.astimezone(ZoneInfo("Africa/Nairobi")).hour == 5


def test_a_long_outage_on_a_minute_schedule_looks_back_only_as_far_as_the_grace() -> None:
    # crontab(5): "* * * * *" fires every minute; half a year is ~260,000 slots, of which
    # only the last day's can be owed, so only those are stepped through.
    trigger = make_trigger("* * * * *", "UTC")
    started = time.monotonic()
    plan = plan_start(trigger, utc(2026, 1, 1), utc(2026, 7, 1, 12, 0, 30), timedelta(days=1))
    assert plan == StartPlan(utc(2026, 7, 1, 12, 0), utc(2026, 7, 1, 12, 1))
    assert time.monotonic() - started < 5  # stepping through every slot takes tens of seconds


@pytest.mark.parametrize(
    ("last", "now", "grace_hours", "why"),
    [
        (None, utc(2026, 11, 2, 9), 24, "a new installation owes nothing"),
        (utc(2026, 11, 2, 5, 30), utc(2026, 11, 2, 9), 24, "today's slot already ran"),
        (utc(2026, 11, 1, 5, 30), utc(2026, 11, 2, 5, 29), 24, "today's slot is still ahead"),
        (utc(2026, 10, 20, 5, 30), utc(2026, 11, 2, 5, 31), 0, "grace 0: never catch up"),
        (utc(2026, 10, 20, 5, 30), utc(2026, 11, 3, 5, 29), 23.9, "missed slot older than grace"),
    ],
)
def test_nothing_owed(last: datetime | None, now: datetime, grace_hours: float, why: str) -> None:
    trigger = make_trigger("30 5 * * *", "UTC")
    plan = plan_start(trigger, last, now, timedelta(hours=grace_hours))
    assert plan.catch_up is None, why
    assert plan.next_fire == fire_after(trigger, now)
    assert plan.next_fire is not None and plan.next_fire > now


def test_a_weekday_schedule_over_a_weekend_depends_on_the_grace() -> None:
    # crontab(5): weekday 1-5 is Monday to Friday (Sunday is 0 or 7). 30 October 2026 is a
    # Friday (calendar), the daemon was down from Friday noon to Monday 05:00.
    trigger = make_trigger("0 6 * * 1-5", "UTC")
    last, now = utc(2026, 10, 29, 6), utc(2026, 11, 2, 5)
    assert plan_start(trigger, last, now, timedelta(hours=24)).catch_up is None  # 71 h old
    friday = plan_start(trigger, last, now, timedelta(hours=72))
    assert friday == StartPlan(utc(2026, 10, 30, 6), utc(2026, 11, 2, 6))


LONDON = ZoneInfo("Europe/London")


def test_across_the_october_fall_back_in_london() -> None:
    # IANA tz database: on 25 October 2026 Europe/London goes from BST (UTC+1) back to GMT
    # at 02:00 BST, so 01:00-02:00 local happens twice (00:00-01:00Z and 01:00-02:00Z).
    trigger = make_trigger("30 1 * * *", "Europe/London")
    slots = []
    moment = utc(2026, 10, 24, 12)
    for _ in range(3):
        moment = fire_after(trigger, moment)  # type: ignore[assignment]
        slots.append(moment.astimezone(UTC))
    # APScheduler fires twice in the repeated hour (libraries.md §1.3); stepping in UTC
    # moves on instead of finding the second 01:30 again (digest.schedule.missed_slot
    # loops forever on this input: see the report of this change).
    assert slots == [utc(2026, 10, 25, 0, 30), utc(2026, 10, 25, 1, 30), utc(2026, 10, 26, 1, 30)]

    # Down over the change: one catch-up for 25 October (coalesced), the latest slot.
    last, now = utc(2026, 10, 24, 0, 30), utc(2026, 10, 25, 9)
    assert plan_start(trigger, last, now, timedelta(hours=24)) == StartPlan(
        utc(2026, 10, 25, 1, 30), utc(2026, 10, 26, 1, 30)
    )
    # The first 01:30 (BST) ran; a restart at 01:45 GMT owes nothing: cron(8) "if the time
    # has moved backwards by less than 3 hours, those jobs that fall into the repeated time
    # will not be re-run".
    ran = utc(2026, 10, 25, 0, 30)
    assert plan_start(trigger, ran, utc(2026, 10, 25, 1, 45), timedelta(hours=24)).catch_up is None
    assert repeated_hour(utc(2026, 10, 25, 1, 30), ran, LONDON)
    assert not repeated_hour(utc(2026, 10, 26, 1, 30), ran, LONDON)  # the next day
    assert not repeated_hour(utc(2026, 10, 25, 1, 30), ran, UTC)  # in UTC nothing repeats


def test_a_morning_schedule_in_london_keeps_its_wall_clock_time() -> None:
    # 05:30 local is 04:30Z in BST and 05:30Z in GMT (IANA tz database).
    trigger = make_trigger("30 5 * * *", "Europe/London")
    last, now = utc(2026, 10, 24, 4, 30), utc(2026, 10, 26, 7)
    assert plan_start(trigger, last, now, timedelta(hours=24)) == StartPlan(
        utc(2026, 10, 26, 5, 30), utc(2026, 10, 27, 5, 30)
    )
    # the October slot right after the change is owed at its GMT time, not an hour early
    plan = plan_start(trigger, last, utc(2026, 10, 25, 5, 0), timedelta(hours=24))
    assert plan == StartPlan(None, utc(2026, 10, 25, 5, 30))


def test_across_the_march_spring_forward_in_london() -> None:
    # IANA tz database: on 29 March 2026 01:00 GMT becomes 02:00 BST; 01:30 does not exist.
    # The day still gets exactly one slot (APScheduler runs it an hour late, 02:30 BST).
    trigger = make_trigger("30 1 * * *", "Europe/London")
    day = [
        s
        for s in (
            latest_slot(trigger, utc(2026, 3, 28, 12), utc(2026, 3, 29, 12)),
            fire_after(trigger, utc(2026, 3, 28, 12)),
        )
        if s is not None
    ]
    assert len({s.astimezone(UTC) for s in day}) == 1
    [slot] = {s.astimezone(UTC) for s in day}
    assert slot.date() == datetime(2026, 3, 29).date() and slot.astimezone(LONDON).hour in (1, 2)
    last, now = utc(2026, 3, 28, 1, 30), utc(2026, 3, 29, 8)
    assert plan_start(trigger, last, now, timedelta(hours=24)).catch_up == slot


def test_an_interrupted_run_is_owed_again_unless_a_newer_slot_is() -> None:
    trigger = make_trigger("30 5 * * *", "UTC")
    slot = utc(2026, 11, 2, 5, 30)
    grace = timedelta(hours=24)
    assert plan_start(trigger, slot, utc(2026, 11, 2, 6), grace, retry=slot).catch_up == slot
    newer = plan_start(trigger, slot, utc(2026, 11, 3, 6), grace, retry=slot)
    assert newer.catch_up == utc(2026, 11, 3, 5, 30)
    too_old = plan_start(trigger, slot, utc(2026, 11, 3, 5, 29), timedelta(hours=2), retry=slot)
    assert too_old.catch_up is None


def test_naive_times_are_refused() -> None:
    trigger = make_trigger("30 5 * * *", "UTC")
    with pytest.raises(ValueError, match="time-zone aware"):
        plan_start(trigger, None, datetime(2026, 11, 2, 9), timedelta(hours=1))


# ---- the daemon in this process --------------------------------------------------------------


def test_jobs_are_wired_as_the_issue_asks(tmp_path: Path, demo_data: Path, tls: TLS) -> None:
    config = load_config(write_config(tmp_path, demo_data, port=1, ca_file=tls.ca_file))
    now = datetime.now(UTC)
    daemon = Daemon(config, trigger=make_trigger("* * * * *", "UTC"))  # a slot every minute
    seed_scheduled_run(config, now - timedelta(days=1, minutes=1))  # a slot is owed
    with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
        plan = daemon.prepare(ledger, now)
    assert plan.catch_up is not None and now - plan.catch_up < timedelta(minutes=1)
    nightly = daemon.scheduler.get_job(NIGHTLY)
    assert (nightly.coalesce, nightly.max_instances) == (True, 1)
    assert nightly.misfire_grace_time == 25 * 3600
    assert nightly.executor == "nightly" and nightly.func.__module__ == "digest.daemon"
    catch_up = daemon.scheduler.get_job(CATCH_UP)
    assert catch_up.kwargs["slot"] == plan.catch_up and catch_up.executor == "nightly"
    deliver = daemon.scheduler.get_job(DELIVER)
    assert deliver.trigger.interval == timedelta(minutes=5) and deliver.executor == "default"


def test_a_stop_before_the_scheduler_runs_returns_at_once(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    config = load_config(write_config(tmp_path, demo_data, port=1, ca_file=tls.ca_file))
    daemon = Daemon(config)
    with Ledger.open(config.ledger.url) as ledger, ledger.lock(LOCK_NAME):
        daemon.prepare(ledger, datetime.now(UTC))
        daemon.stop("SIGTERM")  # e.g. arrived during the crash recovery
        thread = threading.Thread(target=daemon.run)
        thread.start()
        thread.join(10)
    assert not thread.is_alive()
    assert not daemon.scheduler.running


def test_a_missing_relay_password_stops_serve_before_it_starts(
    tmp_path: Path, demo_data: Path, tls: TLS, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = write_config(tmp_path, demo_data, port=1, ca_file=tls.ca_file, auth=True)
    monkeypatch.delenv(PASSWORD_ENV, raising=False)
    with pytest.raises(ConfigError, match=PASSWORD_ENV) as info:
        serve(load_config(path))
    assert info.value.exit_code == 2  # the CLI exits 2 for configuration errors
    assert not (tmp_path / "ledger.sqlite.daemon.lock").exists()  # never got as far as the lock


# ---- digest serve as processes -------------------------------------------------------------------


class Process:
    """``digest --log-format json serve`` with its stderr read line by line in a thread."""

    def __init__(self, config_path: Path, env: dict[str, str]) -> None:
        command = [sys.executable, "-m", "digest.cli", "--log-format", "json", "serve"]
        self.popen = subprocess.Popen(
            [*command, "--config", str(config_path)],
            cwd=ROOT,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        self.lines: list[str] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.popen.stderr is not None
        for line in self.popen.stderr:
            self.lines.append(line.rstrip("\n"))

    @property
    def pid(self) -> int:
        return self.popen.pid

    def logged(self, text: str) -> bool:
        return any(text in line for line in self.lines)

    def records(self) -> list[dict[str, Any]]:
        return [json.loads(line) for line in self.lines if line.startswith("{")]

    def finish(self, timeout: float = 30) -> int:
        code = self.popen.wait(timeout)
        self._reader.join(5)
        return code

    def kill(self) -> None:
        if self.popen.poll() is None:
            self.popen.kill()
        self.popen.wait(10)
        self._reader.join(5)


def process_env() -> dict[str, str]:
    return dict(os.environ, PYTHONPATH=str(ROOT), **{PASSWORD_ENV: PASSWORD})


def test_two_daemons_on_one_ledger_and_a_sigterm_in_the_middle_of_a_run(
    tmp_path: Path, demo_data: Path, tls: TLS
) -> None:
    maildir = tmp_path / "maildir"
    with running_sink(maildir, tls_context=tls.server, auth=(USER, PASSWORD)) as sink:
        path = write_config(
            tmp_path, demo_data, port=sink.port, ca_file=tls.ca_file, auth=True, grace_hours=25
        )
        config = load_config(path)
        trigger = make_trigger(config.schedule.cron, config.schedule.timezone)
        now = datetime.now(UTC)
        owed = latest_slot(trigger, now - timedelta(days=2), now)
        assert owed is not None
        seed_scheduled_run(config, owed - timedelta(days=1))  # yesterday's run: today's is owed
        env = process_env()
        one, two = Process(path, env), Process(path, env)  # started together: one wins
        try:
            loser = wait_until(
                lambda: next((p for p in (one, two) if p.popen.poll() is not None), None),
                60,
                "one of the two daemons to refuse",
            )
            winner = two if loser is one else one
            assert loser.finish() == 1, loser.lines
            # The lock is the ledger's (flock on <ledger>.daemon.lock); the refusal names
            # the process that holds it.
            assert any(f"another digest process (pid {winner.pid})" in x for x in loser.lines)
            wait_until(
                lambda: any(r.status == "running" for r in runs(config)), 60, "the catch-up run"
            )
            winner.popen.send_signal(signal.SIGTERM)  # in the middle of the catch-up run
            assert winner.finish(60) == 0, winner.lines
        finally:
            one.kill()
            two.kill()
    records = winner.records()
    messages = [r["message"] for r in records]
    stop = next(i for i, m in enumerate(messages) if m.startswith("SIGTERM: stopping"))
    finished = [i for i, m in enumerate(messages) if " succeeded in " in m]
    assert finished and finished[0] > stop, messages  # the run went on to its end
    assert messages[-1] == "digest daemon stopped"
    [run] = [r for r in runs(config) if r.id != "seed"]
    assert (run.status, run.scheduled_for) == ("succeeded", owed)
    with Ledger.open(config.ledger.url) as ledger:
        depth = ledger.outbox.depth()
    assert depth.counts == {
        "pending": 0,
        "sending": 0,
        "sent": len(recipients(config)),
        "failed": 0,
    }
    assert sum(message_ids(maildir).values()) == len(recipients(config))
    # Every line of the run carries its id (logs.run_context); no secret reaches the log.
    run_lines = [r for r in records if run.id in r["message"]]
    assert run_lines and all(r["run_id"] == run.id for r in run_lines)
    assert not any(PASSWORD in line for line in one.lines + two.lines)
    assert "catch-up: last scheduled run" in "\n".join(messages)
