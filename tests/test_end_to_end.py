"""End to end on the invented demo scenario: every injected problem is found, band alerts
agree with an independent pandas computation, and a dry run delivers one digest per
recipient with alerts to a real SMTP sink (aiosmtpd on loopback, verified STARTTLS).

References: pandas ``rolling`` windows (mean, sample std with ddof=1) for the bands;
RFC 2046 §5.1.4 (text/plain first, HTML last) for the message structure.
"""

from __future__ import annotations

import shutil
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from digest import demo_data
from digest.config import Config, load_config
from digest.jobs import run_job
from digest.pipeline import RunResult, run_pipeline
from digest.testing import free_port, read_maildir

DEMO = Path(__file__).resolve().parent.parent / "demo"
NOW = datetime(2026, 11, 3, 2, 15, tzinfo=UTC)


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("demo")
    shutil.copyfile(DEMO / "config.toml", folder / "config.toml")
    demo_data.generate(folder / "data")
    return folder


def _plain_bands(config: Config) -> Config:
    """The demo config with bands learned from every past value (no exclusion of flagged
    values), which is what the pandas reference below computes."""
    bands = []
    for band in config.band:
        fields = type(band).model_fields
        bands.append(
            band.model_copy(update={"exclude_flagged": False})
            if "exclude_flagged" in fields
            else band
        )
    return config.model_copy(update={"band": bands})


@pytest.fixture(scope="module")
def config(demo_dir: Path) -> Config:
    return _plain_bands(load_config(demo_dir / "config.toml"))


@pytest.fixture(scope="module")
def result(config: Config) -> RunResult:
    return run_pipeline(config, run_id="e2e")


def test_every_injected_problem_of_the_last_period_is_found(
    result: RunResult, demo_dir: Path
) -> None:
    truth = pd.read_csv(demo_dir / "data" / "truth.csv", dtype=str)
    last = truth[truth["period"] == result.period]
    assert len(last) > 0
    found = set(
        zip(result.alerts["check"], result.alerts["unit"], result.alerts["period"], strict=True)
    )
    missing = [
        t for t in zip(last["check"], last["unit"], last["period"], strict=True) if t not in found
    ]
    assert missing == []


def test_non_band_checks_raise_exactly_the_injected_problems(
    result: RunResult, demo_dir: Path
) -> None:
    truth = pd.read_csv(demo_dir / "data" / "truth.csv", dtype=str)
    band_checks = {c.name for c in result.config.check if c.kind == "band"}
    expected = {
        (c, u)
        for c, u, p in zip(truth["check"], truth["unit"], truth["period"], strict=True)
        if p == result.period and c not in band_checks
    }
    alerts = result.alerts[~result.alerts["check"].isin(band_checks)]
    assert set(zip(alerts["check"], alerts["unit"], strict=True)) == expected


def _valid_values(demo_dir: Path, config: Config) -> pd.DataFrame:
    """values.csv read by pandas, bad lines dropped by the generator's own list."""
    values = pd.read_csv(demo_dir / "data" / "values.csv", dtype=str, keep_default_na=False)
    values["line"] = np.arange(2, len(values) + 2)
    bad = pd.read_csv(demo_dir / "data" / "bad_rows.csv")
    values = values[~values["line"].isin(bad["line"])]
    values = values.drop_duplicates(["unit", "metric", "period"])
    values["value"] = values["value"].astype(float)
    return values


def _pandas_band_alerts(demo_dir: Path, config: Config, period: str) -> set[tuple[str, str]]:
    """Band alerts recomputed with pandas rolling windows over each unit's own series."""
    values = _valid_values(demo_dir, config)
    units = pd.read_csv(demo_dir / "data" / "units.csv", dtype=str, keep_default_na=False)
    parent = dict(zip(units["id"], units["parent"], strict=True))
    periods = pd.period_range(values["period"].min(), period, freq="M").strftime("%Y-%m")
    found: set[tuple[str, str]] = set()
    for check in config.check:
        if check.kind != "band":
            continue
        band = config.band_named(check.band)
        rows = values[values["metric"] == band.metric]
        for level in check.levels:
            frame = rows.copy()
            if level == "district":
                frame["unit"] = frame["unit"].map(parent)
            wide = frame.groupby(["unit", "period"])["value"].sum(min_count=1).unstack()
            wide = wide.reindex(columns=periods)
            past = wide.T.shift(band.gap + 1)
            mean = past.rolling(band.window, min_periods=band.min_points).mean().T[period]
            sd = past.rolling(band.window, min_periods=band.min_points).std(ddof=1).T[period]
            k = band.k if band.k is not None else 3.0
            low = (mean - k * sd).clip(lower=0)
            high = mean + k * sd
            value = wide[period]
            flagged = value.notna() & mean.notna() & ((value > high) | (value < low))
            found |= {(check.name, unit) for unit in flagged[flagged].index}
    return found


def test_band_alerts_agree_with_pandas_rolling(
    result: RunResult, config: Config, demo_dir: Path
) -> None:
    ours = result.alerts[result.alerts["kind"] == "band"]
    assert set(zip(ours["check"], ours["unit"], strict=True)) == _pandas_band_alerts(
        demo_dir, config, result.period
    )


def test_dry_run_delivers_one_digest_per_recipient_to_a_real_sink(
    config: Config, demo_dir: Path, tmp_path: Path
) -> None:
    maildir = tmp_path / "maildir"
    sink = config.sink.model_copy(update={"port": free_port(), "maildir": maildir})
    mail = config.mail.model_copy(update={"all_clear": False, "charts": 2})
    outcome = run_job(
        config.model_copy(update={"sink": sink, "mail": mail}),
        now=NOW,
        mode="dry-run",
        out_dir=tmp_path / "out",
    )
    assert outcome.digests, "the demo has alerts for several recipients"
    assert all(r.status == "sent" for r in outcome.delivery)
    received = read_maildir(maildir)
    assert sorted(m["X-Sink-Rcpt-To"] for m in received) == sorted(
        p.recipient.email for p in outcome.digests
    )
    for message in received:
        alternative = next(
            p for p in message.walk() if p.get_content_type() == "multipart/alternative"
        )
        parts = [p.get_content_type() for p in alternative.iter_parts()]
        assert parts[0] == "text/plain"  # RFC 2046 §5.1.4: the richest alternative last
        assert parts[-1] in {"text/html", "multipart/related"}
        assert message["Auto-Submitted"] == "auto-generated"  # RFC 3834 §5


def test_a_district_officer_hears_only_about_their_district(
    config: Config, result: RunResult
) -> None:
    from digest.recipients import load_recipients
    from digest.route import route

    recipients = load_recipients(
        config.mail.recipients, result.hierarchy, {c.programme for c in config.check}
    )
    routing = route(result.alerts, recipients, result.hierarchy)
    h = result.hierarchy
    for bundle in routing.bundles:
        home = bundle.recipient.unit_index
        subtree = set(h.subtree(home).tolist())
        assert set(bundle.alerts["unit_index"].astype(int)) <= subtree
