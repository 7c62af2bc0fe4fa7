"""Configuration: TOML files validated by pydantic models.

Every error names the file, the dotted key path and what was expected, one line per
problem. Relative paths in the file are resolved against the file's own folder.
Secrets never live in the file: the relay password is read from the environment
variable named by ``relay.password_env``.
"""

from __future__ import annotations

import ipaddress
import os
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    field_validator,
    model_validator,
)

from digest import expressions
from digest.errors import ConfigError
from digest.periods import PeriodKind

Severity = Literal["critical", "warning", "notice"]
SEVERITY_RANK: dict[str, int] = {"critical": 0, "warning": 1, "notice": 2}


def _code(value: str) -> str:
    if not value.isidentifier() or value.startswith("_"):
        raise ValueError("must be a plain code of letters, digits and _ (e.g. anc1_visits)")
    return value


def _one_line(value: str) -> str:
    if any(ord(ch) < 32 and ch != "\t" for ch in value):
        raise ValueError("must not contain newlines or control characters")
    return value


def _email_address(value: str) -> str:
    value = value.strip()
    if any(ord(ch) < 33 or ord(ch) > 126 for ch in value):
        raise ValueError("must be a plain ASCII address without spaces or control characters")
    local, _, domain = value.partition("@")
    if not local or not domain or "@" in domain or "." not in domain or domain.startswith("."):
        raise ValueError("must look like name@example.org")
    return value


Code = Annotated[str, AfterValidator(_code)]
Line = Annotated[str, AfterValidator(_one_line)]
EmailAddress = Annotated[str, AfterValidator(_email_address)]


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True, frozen=True)


# ---- data sources: a file, or a query on an SQL database --------------------------------

_TABLE_NAME = r"^[A-Za-z_][A-Za-z0-9_]{0,62}(\.[A-Za-z_][A-Za-z0-9_]{0,62})?$"


class DatabaseConfig(Strict):
    """An SQL database reached through SQLAlchemy; the password comes from the environment."""

    url: Line = Field(
        description="SQLAlchemy URL without a password, e.g. postgresql+psycopg://digest@db:5432/hmis "
        "or sqlite:///data.sqlite (relative SQLite paths follow the config file)."
    )
    password_env: Code | None = Field(
        None, description="Name of the environment variable holding the database password."
    )

    @model_validator(mode="before")
    @classmethod
    def _no_password_in_url(cls, raw: Any) -> Any:
        # checked on the whole table so that a refused URL is never echoed in the message
        if isinstance(raw, dict) and isinstance(raw.get("url"), str):
            from sqlalchemy.engine import make_url
            from sqlalchemy.exc import ArgumentError

            try:
                url = make_url(raw["url"])
            except ArgumentError:
                raise ValueError(
                    "url: not an SQLAlchemy URL; expected e.g. "
                    "postgresql+psycopg://user@host:5432/database or sqlite:///file.sqlite"
                ) from None
            if url.password is not None:
                raise ValueError(
                    "url: must not contain a password; put the password in an environment "
                    "variable and give its name as password_env"
                )
        return raw

    def sqlalchemy_url(self) -> Any:
        """The URL with the password from ``password_env`` filled in (never log it)."""
        from sqlalchemy.engine import make_url

        url = make_url(self.url)
        if self.password_env is None:
            return url
        value = os.environ.get(self.password_env)
        if value is None:
            raise ConfigError(
                f"{self.shown_url}: environment variable {self.password_env} (password_env) "
                "is not set; export it before running"
            )
        return url.set(password=value)

    @property
    def shown_url(self) -> str:
        from sqlalchemy.engine import make_url

        return make_url(self.url).render_as_string(hide_password=True)


class TableSource(DatabaseConfig):
    """Rows of a query: ``{ url = ..., query = "SELECT ...", password_env = ... }``."""

    query: str = Field(description="A SELECT (or WITH ... SELECT) returning the source's columns.")

    @field_validator("query")
    @classmethod
    def _select(cls, value: str) -> str:
        words = value.split(None, 1)
        if not words or words[0].lower() not in {"select", "with"}:
            raise ValueError("must be a query starting with SELECT or WITH")
        return value


def _source_kind(value: Any) -> str:
    return "table" if isinstance(value, dict | TableSource) else "path"


Source = Annotated[
    Annotated[Path, Tag("path")] | Annotated[TableSource, Tag("table")],
    Discriminator(_source_kind),
]


class DataConfig(Strict):
    units: Source = Field(
        description="The hierarchy: a CSV file id,name,parent,level[,opened,closed], or a table "
        "{ url, query, password_env } whose query returns those columns."
    )
    values: Source = Field(
        description="Reported values in long form: a CSV or Parquet file, or a table "
        "{ url, query, password_env } whose query returns unit, metric, period, value."
    )
    period: PeriodKind = Field("month", description="Period type: month (2026-10) or week.")
    levels: list[Code] = Field(
        description="Level names, top first; values are captured at the last one.", min_length=1
    )
    max_reject_share: float = Field(
        0.05, ge=0, le=1, description="The run fails when more than this share of rows is rejected."
    )
    chunk_rows: int = Field(
        200_000,
        ge=1,
        description="Rows read at a time from a query or a Parquet file (memory stays bounded).",
    )

    @field_validator("levels")
    @classmethod
    def _distinct_levels(cls, levels: list[str]) -> list[str]:
        if len(set(levels)) != len(levels):
            raise ValueError("level names must be distinct")
        return levels


class CountRule(Strict):
    metric: Code = Field(description="Raw metric that the matching records are counted into.")
    where: str | None = Field(
        None,
        description='Condition on record columns, e.g. "age_years < 5 and test_result == '
        "'positive'\"; without it every record counts.",
    )

    @field_validator("where")
    @classmethod
    def _safe_where(cls, value: str | None) -> str | None:
        if value is None:
            return value
        from digest.sources import WhereError, parse_where

        try:
            parse_where(value)
        except WhereError as exc:
            raise ValueError(str(exc)) from None
        return value


class RecordsConfig(Strict):
    """Individual records (one row per case or visit), counted per unit, metric and period."""

    name: Code = Field(description="Name of the source, shown in rejects as records:<name>.")
    path: Path | None = Field(None, description="CSV or Parquet file of the records.")
    table: TableSource | None = Field(None, description="Or a query: { url, query, password_env }.")
    unit: str = Field("unit", min_length=1, description="Column holding the capture-level unit id.")
    date: str | None = Field(
        None, description="Column of ISO dates; a record counts in the period containing it."
    )
    period: str | None = Field(
        None, description="Or a column of ISO periods (2026-10 or 2026-W42)."
    )
    count: list[CountRule] = Field(min_length=1, description="What to count: [[records.count]].")

    @model_validator(mode="after")
    def _one_source_one_time(self) -> RecordsConfig:
        if (self.path is None) == (self.table is None):
            raise ValueError(
                "give either path (a CSV or Parquet file) or table = { url = ..., query = ... }"
            )
        if (self.date is None) == (self.period is None):
            raise ValueError(
                "give either date (a column of ISO dates) or period (a column of ISO periods)"
            )
        return self


class MetricConfig(Strict):
    code: Code = Field(description="Code used in data files and expressions.")
    label: Line = Field(description="Human label shown in digests.")
    count: bool = Field(True, description="A count: negative values are rejected.")


class DerivedConfig(Strict):
    code: Code = Field(description="Code of the derived metric.")
    label: Line = Field(description="Human label shown in digests.")
    expr: str = Field(description="Expression over metric codes, computed per capture unit.")


BandMethodName = Literal["mean_sd", "median_mad", "seasonal", "poisson"]
# k when the file does not give one: 3 SD (mean_sd), the modified z-score cut-off 3.5
# (median_mad, Iglewicz & Hoaglin 1993), 2 SD of historical limits (seasonal, Stroup et
# al. 1989); poisson does not read k (alpha sets its width).
BAND_DEFAULT_K: dict[str, float] = {"mean_sd": 3.0, "median_mad": 3.5, "seasonal": 2.0}


class BandConfig(Strict):
    name: Code = Field(description="Name that checks refer to.")
    metric: Code = Field(description="Metric (raw or derived) whose series is banded.")
    method: BandMethodName = Field(
        "mean_sd",
        description="How centre and spread are learned: mean_sd, median_mad (modified "
        "z-score), seasonal (historical limits) or poisson (count quantiles).",
    )
    k: float = Field(
        None,  # type: ignore[assignment]  # resolved per method by _default_k
        gt=0,
        validate_default=True,
        description="Width of the band in spreads either side of the centre; default 3 "
        "for mean_sd, 3.5 for median_mad, 2 for seasonal (not read by poisson).",
    )
    window: int = Field(12, ge=2, description="How many past periods feed the band.")
    gap: int = Field(0, ge=0, description="Periods right before the evaluated one left out.")
    min_points: int = Field(6, ge=2, description="Fewest reported values needed for a band.")
    years: int = Field(
        5, ge=1, le=20, description="Seasonal baseline: how many previous years are used."
    )
    span: int = Field(
        1, ge=0, description="Seasonal baseline: periods either side of the same period."
    )
    robust: bool = Field(
        False, description="Seasonal: median and 1.4826 × MAD instead of mean and SD."
    )
    alpha: float = Field(
        0.001,
        gt=0,
        lt=0.5,
        description="Poisson (and the median_mad fallback): tail probability of each limit.",
    )
    dispersion_threshold: float = Field(
        1.5,
        ge=1,
        description="Poisson: above this variance/mean ratio a negative binomial is used.",
    )
    baseline: Literal["window", "seasonal"] = Field(
        "window", description="Poisson: the mean comes from the trailing window or seasonal."
    )
    exclude_flagged: bool = Field(
        True, description="Values outside their own band are left out of later baselines."
    )
    levels: list[Code] = Field(description="Levels on which the band is learned.", min_length=1)

    @field_validator("k", mode="before")
    @classmethod
    def _default_k(cls, value: Any, info: Any) -> Any:
        if value is None:
            return BAND_DEFAULT_K.get(info.data.get("method", "mean_sd"), 3.0)
        return value

    @property
    def seasonal_baseline(self) -> bool:
        """Whether the band learns from the same season of earlier years."""
        return self.method == "seasonal" or (
            self.method == "poisson" and self.baseline == "seasonal"
        )

    def unused_keys(self) -> list[str]:
        """Keys given in the file that this band's method does not read."""
        reads = {"name", "metric", "method", "levels", "min_points", "exclude_flagged"}
        reads |= {"years", "span"} if self.seasonal_baseline else {"window", "gap"}
        reads |= {
            "mean_sd": {"k"},
            "median_mad": {"k", "alpha"},
            "seasonal": {"k", "robust"} | ({"alpha"} if self.robust else set()),
            "poisson": {"alpha", "dispersion_threshold", "baseline"},
        }[self.method]
        return sorted(self.model_fields_set - reads)


class CheckBase(Strict):
    name: Code = Field(description="Unique check name.")
    severity: Severity = Field("warning", description="critical, warning or notice.")
    programme: Code = Field(description="Programme tag recipients subscribe to.")
    levels: list[Code] = Field(description="Levels at which the check runs.", min_length=1)
    when: str | None = Field(None, description="Expression that must hold for the check to apply.")
    advice: Line | None = Field(None, description="What to do next, shown with each alert.")


# Reporting completeness target: at least 80 % of the units expected to report, the
# timeliness/completeness threshold of integrated disease surveillance (Fall et al.,
# BMJ Global Health 2019;4:e001427).
MIN_COMPLETENESS = 0.8
ShareTest = Literal["plain", "binomial"]


def _min_completeness() -> Any:
    return Field(
        MIN_COMPLETENESS,
        ge=0,
        le=1,
        description="On totals: below this share of children reporting, an alert is labelled "
        "as probably a reporting gap.",
    )


def _confidence() -> Any:
    return Field(
        0.99,
        gt=0,
        lt=1,
        description="test = binomial: confidence of the Wilson score interval (0.99 = 99 %).",
    )


class BandCheck(CheckBase):
    kind: Literal["band"]
    band: Code = Field(description="Name of the [[band]] to compare against.")
    min_completeness: float = _min_completeness()


class BoundsCheck(CheckBase):
    kind: Literal["bounds"]
    expr: str | None = Field(
        None,
        description="Expression whose value must stay within [min, max]; with numerator and "
        "denominator it is numerator / denominator × 100 and is not given.",
    )
    low: float | None = Field(None, alias="min", description="Lowest allowed value.")
    high: float | None = Field(None, alias="max", description="Highest allowed value.")
    numerator: str | None = Field(None, description="Share: expression counting the cases.")
    denominator: str | None = Field(None, description="Share: expression counting all cases.")
    test: ShareTest = Field(
        "plain",
        description="plain: the value outside [min, max]; binomial: the share's Wilson "
        "interval entirely outside (needs numerator and denominator).",
    )
    confidence: float = _confidence()
    min_completeness: float = _min_completeness()

    @property
    def value_expr(self) -> str:
        """The expression evaluated: ``expr``, or the share numerator / denominator × 100."""
        if self.numerator is not None and self.denominator is not None:
            return f"{_grouped(self.numerator)} / {_grouped(self.denominator)} * 100"
        return self.expr or ""


def _grouped(text: str) -> str:
    text = text.strip()
    return text if text.isidentifier() else f"({text})"


class DropoutCheck(CheckBase):
    kind: Literal["dropout"]
    first: Code = Field(description="Metric of the first dose.")
    last: Code = Field(description="Metric of the last dose.")
    low: float | None = Field(None, alias="min", description="Lowest allowed dropout, percent.")
    high: float | None = Field(None, alias="max", description="Highest allowed dropout, percent.")
    test: ShareTest = Field(
        "plain",
        description="plain: the dropout outside [min, max]; binomial: the Wilson interval of "
        "the share of non-completers entirely outside (negative dropout stays plain).",
    )
    confidence: float = _confidence()


class RelationCheck(CheckBase):
    kind: Literal["relation"]
    expr: str = Field(description="Boolean expression that must hold.")


class SilenceCheck(CheckBase):
    kind: Literal["silence"]
    metric: Code = Field(description="Metric whose reporting is watched.")
    periods: int = Field(3, ge=1, description="Recent periods with no report that raise the alert.")
    window: int = Field(12, ge=1, description="Periods before those in which it used to report.")
    min_history: int = Field(6, ge=1, description="Reports needed in that window.")


Check = Annotated[
    BandCheck | BoundsCheck | DropoutCheck | RelationCheck | SilenceCheck,
    Field(discriminator="kind"),
]


class MailConfig(Strict):
    sender: EmailAddress = Field(
        "digest@localhost.localdomain", alias="from", description="From address of digests."
    )
    sender_name: Line = Field("Data quality digest", alias="from_name", description="From name.")
    reply_to: EmailAddress | None = Field(None, description="Monitored address for replies.")
    admin: EmailAddress | None = Field(None, description="Administrator: alarms and run summaries.")
    admin_name: Line = Field("the data manager", description="Who to ask to change a subscription.")
    recipients: Path | None = Field(None, description="CSV of recipients.")
    templates: Path | None = Field(
        None, description="Folder whose templates override the defaults."
    )
    charts: int = Field(10, ge=0, le=50, description="Alerts per digest that get a chart.")
    history: int = Field(6, ge=1, le=36, description="Past values shown with each alert.")
    all_clear: bool = Field(
        False, description="Send a short message when a recipient has no alerts."
    )
    domain: Line = Field("localhost.localdomain", description="Domain for Message-ID headers.")
    remind_every_days: int = Field(
        7, ge=1, description="Open alerts are repeated in a digest after this many days."
    )
    run_summary: bool = Field(False, description="Mail the administrator a summary after each run.")


class RelayConfig(Strict):
    host: Line = Field("localhost", description="Relay host name, as on its certificate.")
    port: int = Field(587, ge=1, le=65535, description="587 for STARTTLS, 465 for implicit TLS.")
    security: Literal["starttls", "tls", "none"] = Field(
        "starttls", description="starttls, tls, or none (loopback hosts only)."
    )
    username: Line | None = Field(None, description="Login name, if the relay wants AUTH.")
    password_env: Code | None = Field(
        None, description="Name of the environment variable holding the password."
    )
    ca_file: Path | None = Field(None, description="PEM file of a private certificate authority.")
    timeout: float = Field(30.0, gt=0, description="Seconds per socket operation.")
    local_hostname: Line | None = Field(None, description="Name sent in EHLO.")
    attempts: int = Field(4, ge=1, le=20, description="Tries per message within one run.")
    backoff: float = Field(2.0, ge=0, description="Seconds before the second try; doubles after.")

    @field_validator("security")
    @classmethod
    def _plaintext_only_to_loopback(cls, value: str, info: Any) -> str:
        host = info.data.get("host", "localhost")
        if value == "none" and not _is_loopback(host):
            raise ValueError(
                f"security = 'none' is allowed only for a loopback host, not {host!r}; "
                "use starttls or tls"
            )
        return value

    def password(self) -> str | None:
        """Read the password from the environment; ConfigError when it is named but unset."""
        if self.password_env is None:
            return None
        value = os.environ.get(self.password_env)
        if value is None:
            raise ConfigError(
                f"relay.password_env: environment variable {self.password_env} is not set; "
                "export it before running"
            )
        return value


class SinkConfig(Strict):
    host: Line = Field("127.0.0.1", description="Loopback address of the test sink.")
    port: int = Field(8025, ge=1, le=65535, description="Port of the test sink.")
    maildir: Path = Field(Path("out/maildir"), description="Where the sink stores messages.")


class ScheduleConfig(Strict):
    cron: Line = Field("30 5 * * *", description="Standard 5-field crontab expression.")
    timezone: Line = Field("UTC", description="IANA time zone the expression is read in.")
    grace_hours: float = Field(
        24, ge=0, description="A run missed while the daemon was down is made up within this."
    )

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        from digest.schedule import check_timezone

        check_timezone(value)
        return value

    @field_validator("cron")
    @classmethod
    def _valid_cron(cls, value: str) -> str:
        from digest.schedule import make_trigger

        make_trigger(value, "UTC")
        return value


class LedgerConfig(Strict):
    url: Line = Field(
        "sqlite:///out/ledger.sqlite",
        description="SQLAlchemy URL of the state database; relative SQLite paths follow the file.",
    )


class DeliveryConfig(Strict):
    retry_first_minutes: float = Field(5, gt=0, description="Wait before the first retry.")
    retry_max_minutes: float = Field(240, gt=0, description="Longest wait between retries.")
    give_up_hours: float = Field(72, gt=0, description="A message still unsent after this fails.")
    relay_alarm_minutes: float = Field(
        60, gt=0, description="Alarm when the relay has been unreachable this long."
    )


class TableOutput(DatabaseConfig):
    """Bands and totals written back to a database after each run, replaced per period."""

    name: str = Field(
        "digest_bands",
        pattern=_TABLE_NAME,
        description="Table of the bands (schema.table allowed).",
    )
    totals: str = Field(
        "digest_totals",
        pattern=_TABLE_NAME,
        description="Table of the totals per level: unit, level, metric, period, value, ...",
    )


class OutputConfig(Strict):
    dir: Path = Field(Path("out"), description="Default folder for alerts.csv, bands.parquet ...")
    table: TableOutput | None = Field(
        None, description="Also write bands and totals to a database: { url, name, password_env }."
    )


class EngineConfig(Strict):
    kind: Literal["local", "dask"] = Field(
        "local", description="local: numpy/pandas in this process; dask: dask.distributed."
    )
    scheduler: Line | None = Field(
        None, description="Dask scheduler address (tcp://host:8786); absent: a local cluster."
    )
    workers: int = Field(2, ge=1, description="Local cluster: worker processes.")
    threads_per_worker: int = Field(1, ge=1, description="Local cluster: threads per worker.")
    processes: bool = Field(
        True, description="Local cluster: workers as processes (false: threads of this process)."
    )

    @model_validator(mode="after")
    def _keys_for_kind(self) -> EngineConfig:
        local_cluster = {"workers", "threads_per_worker", "processes"}
        if self.kind == "local":
            extra = sorted(self.model_fields_set & ({"scheduler"} | local_cluster))
            if extra:
                raise ValueError(f"{', '.join(extra)}: only read with kind = 'dask'")
        elif self.scheduler is not None:
            if "://" not in self.scheduler:
                raise ValueError("scheduler: give an address like tcp://10.0.0.5:8786")
            extra = sorted(self.model_fields_set & local_cluster)
            if extra:
                raise ValueError(
                    f"{', '.join(extra)}: only for a local cluster; the scheduler's cluster "
                    "has its own workers (remove these or remove scheduler)"
                )
        return self


class TuningConfig(Strict):
    max_alerts_per_digest: int = Field(
        15, ge=1, description="backtest: the most alerts one digest should carry in a period."
    )


class Config(Strict):
    data: DataConfig
    metric: list[MetricConfig] = Field(min_length=1)
    derived: list[DerivedConfig] = Field(default_factory=list)
    band: list[BandConfig] = Field(default_factory=list)
    check: list[Check] = Field(default_factory=list)
    mail: MailConfig = Field(default_factory=MailConfig)  # type: ignore[arg-type]
    relay: RelayConfig = Field(default_factory=RelayConfig)  # type: ignore[arg-type]
    sink: SinkConfig = Field(default_factory=SinkConfig)  # type: ignore[arg-type]
    output: OutputConfig = Field(default_factory=OutputConfig)  # type: ignore[arg-type]
    schedule: ScheduleConfig = Field(default_factory=ScheduleConfig)  # type: ignore[arg-type]
    ledger: LedgerConfig = Field(default_factory=LedgerConfig)  # type: ignore[arg-type]
    delivery: DeliveryConfig = Field(default_factory=DeliveryConfig)  # type: ignore[arg-type]
    tuning: TuningConfig = Field(default_factory=TuningConfig)  # type: ignore[arg-type]
    records: list[RecordsConfig] = Field(default_factory=list)
    engine: EngineConfig = Field(default_factory=EngineConfig)  # type: ignore[arg-type]
    source: Path | None = Field(None, exclude=True, description="The file this was read from.")

    # ---- lookups used by the stages -------------------------------------------------
    @property
    def metric_labels(self) -> dict[str, str]:
        labels = {m.code: m.label for m in self.metric}
        labels.update({d.code: d.label for d in self.derived})
        return labels

    @property
    def capture_level(self) -> str:
        return self.data.levels[-1]

    def band_named(self, name: str) -> BandConfig:
        return next(b for b in self.band if b.name == name)


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


# ---- loading -------------------------------------------------------------------------


def load_config(path: str | Path) -> Config:
    """Read, validate and cross-check a TOML config; raise ConfigError listing every problem."""
    path = Path(path)
    try:
        with path.open("rb") as fh:
            raw = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"{path}: file not found; pass --config with a TOML file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from None
    return config_from_dict(raw, path)


def config_from_dict(raw: dict[str, Any], path: Path) -> Config:
    try:
        config = Config.model_validate(raw)
    except ValidationError as exc:
        raise ConfigError([f"{path}: {line}" for line in format_validation_error(exc)]) from None
    config = _resolve_paths(config, path)
    problems = cross_check(config)
    if problems:
        raise ConfigError([f"{path}: {p}" for p in problems])
    return config


def format_validation_error(exc: ValidationError) -> list[str]:
    lines = []
    for error in exc.errors(include_url=False):
        key = _key_path(error["loc"])
        got = error.get("input")
        shown = "" if isinstance(got, dict | list) or got is None else f" (got {got!r})"
        message = error["msg"]
        if error["type"] == "missing":
            message = "required key is missing"
        elif error["type"] == "extra_forbidden":
            message = "unknown key; check the spelling against config/digest.toml"
        lines.append(f"{key}: {message}{shown}")
    return lines


def _key_path(loc: tuple[Any, ...]) -> str:
    parts: list[str] = []
    for item in loc:
        if isinstance(item, int):
            parts[-1] = f"{parts[-1]}[{item}]" if parts else f"[{item}]"
        elif (
            item in {"band", "bounds", "dropout", "relation", "silence"}
            and parts
            and "[" in parts[-1]
        ):
            continue  # the union tag pydantic inserts after check[i]
        else:
            parts.append(str(item))
    return ".".join(parts) or "(top level)"


def _resolve_paths(config: Config, path: Path) -> Config:
    base = path.parent

    def resolve(p: Path | None) -> Path | None:
        return None if p is None else (p if p.is_absolute() else (base / p))

    def resolve_source(s: Any) -> Any:
        if isinstance(s, DatabaseConfig):
            return s.model_copy(update={"url": _resolve_sqlite(s.url, base)})
        return resolve(s)

    data = config.data.model_copy(
        update={
            "units": resolve_source(config.data.units),
            "values": resolve_source(config.data.values),
        }
    )
    records = [
        r.model_copy(update={"path": resolve(r.path), "table": resolve_source(r.table)})
        for r in config.records
    ]
    mail = config.mail.model_copy(
        update={
            "recipients": resolve(config.mail.recipients),
            "templates": resolve(config.mail.templates),
        }
    )
    relay = config.relay.model_copy(update={"ca_file": resolve(config.relay.ca_file)})
    sink = config.sink.model_copy(update={"maildir": resolve(config.sink.maildir)})
    output = config.output.model_copy(
        update={"dir": resolve(config.output.dir), "table": resolve_source(config.output.table)}
    )
    ledger = config.ledger.model_copy(update={"url": _resolve_sqlite(config.ledger.url, base)})
    return config.model_copy(
        update={
            "data": data,
            "mail": mail,
            "relay": relay,
            "sink": sink,
            "output": output,
            "ledger": ledger,
            "records": records,
            "source": path,
        }
    )


def _resolve_sqlite(url: str, base: Path) -> str:
    """``sqlite:///relative/path`` is read relative to the config file's folder."""
    prefix = "sqlite:///"
    if url.startswith(prefix) and not url.startswith(prefix + "/") and url != "sqlite://":
        return prefix + str((base / url[len(prefix) :]).resolve())
    return url


def cross_check(config: Config) -> list[str]:
    """Rules that span keys: names exist, levels are declared, expressions are safe."""
    problems: list[str] = []
    levels = set(config.data.levels)
    raw = [m.code for m in config.metric]
    derived = [d.code for d in config.derived]
    codes = raw + derived
    for dup in sorted({c for c in codes if codes.count(c) > 1}):
        problems.append(f"metric/derived code {dup!r} is declared twice; codes must be unique")
    problems += _records_problems(config)
    known: set[str] = set(raw)
    for i, d in enumerate(config.derived):
        try:
            expressions.parse(d.expr, known)
        except expressions.ExpressionError as exc:
            problems.append(f"derived[{i}].expr: {exc}")
        known.add(d.code)
    band_names = [b.name for b in config.band]
    for dup in sorted({n for n in band_names if band_names.count(n) > 1}):
        problems.append(f"band name {dup!r} is used twice; band names must be unique")
    for i, b in enumerate(config.band):
        if b.metric not in known:
            problems.append(f"band[{i}].metric: unknown metric {b.metric!r}; declare it first")
        problems += _level_problems(f"band[{i}].levels", b.levels, levels)
        for key in b.unused_keys():
            problems.append(
                f"band[{i}].{key}: not read by method {b.method!r}"
                + (" with baseline = 'window'" if key in {"years", "span"} else "")
                + "; remove it or choose a method that uses it (see config/digest.toml)"
            )
        if b.seasonal_baseline:
            per_year = 12 if config.data.period == "month" else 52
            slots = b.years * (2 * b.span + 1)
            if 2 * b.span >= per_year:
                problems.append(
                    f"band[{i}].span: {b.span} periods either side reach into the next "
                    f"season; use at most {(per_year - 1) // 2}"
                )
            if b.min_points > slots:
                problems.append(
                    f"band[{i}].min_points: {b.min_points} is more than the {slots} values "
                    f"of the seasonal baseline (years × (2 × span + 1)); "
                    "no band could ever be learned"
                )
        elif b.min_points > b.window:
            problems.append(
                f"band[{i}].min_points: {b.min_points} is more than window = {b.window}; "
                "no band could ever be learned"
            )
    check_names = [c.name for c in config.check]
    for dup in sorted({n for n in check_names if check_names.count(n) > 1}):
        problems.append(f"check name {dup!r} is used twice; check names must be unique")
    for i, c in enumerate(config.check):
        key = f"check[{i}]"
        problems += _level_problems(f"{key}.levels", c.levels, levels)
        if c.when is not None:
            problems += _expr_problems(f"{key}.when", c.when, known)
        if isinstance(c, BandCheck):
            if c.band not in band_names:
                problems.append(f"{key}.band: no [[band]] named {c.band!r}")
            else:
                missing = sorted(set(c.levels) - set(config.band_named(c.band).levels))
                if missing:
                    problems.append(
                        f"{key}.levels: band {c.band!r} is not learned at {', '.join(missing)}; "
                        "add those levels to the band or remove them here"
                    )
        elif isinstance(c, BoundsCheck):
            problems += _bounds_problems(key, c, known)
        elif isinstance(c, RelationCheck):
            problems += _expr_problems(f"{key}.expr", c.expr, known)
        elif isinstance(c, DropoutCheck):
            for field in ("first", "last"):
                if getattr(c, field) not in known:
                    problems.append(f"{key}.{field}: unknown metric {getattr(c, field)!r}")
        elif isinstance(c, SilenceCheck) and c.metric not in known:
            problems.append(f"{key}.metric: unknown metric {c.metric!r}")
        if isinstance(c, BoundsCheck | DropoutCheck):
            if c.low is None and c.high is None:
                problems.append(f"{key}: give min, max or both")
            elif c.low is not None and c.high is not None and c.low > c.high:
                problems.append(f"{key}: min ({c.low}) is above max ({c.high})")
        if isinstance(c, SilenceCheck) and c.min_history > c.window:
            problems.append(f"{key}.min_history: more than window = {c.window}")
    return problems


def _records_problems(config: Config) -> list[str]:
    """[[records]]: distinct names; each rule counts into a raw metric, once per source."""
    problems: list[str] = []
    names = [r.name for r in config.records]
    for dup in sorted({n for n in names if names.count(n) > 1}):
        problems.append(f"records name {dup!r} is used twice; records names must be unique")
    raw = {m.code for m in config.metric}
    derived = {d.code for d in config.derived}
    for i, records in enumerate(config.records):
        seen: set[str] = set()
        for j, rule in enumerate(records.count):
            key = f"records[{i}].count[{j}].metric"
            if rule.metric in derived:
                problems.append(
                    f"{key}: {rule.metric!r} is a derived metric, computed by the tool; "
                    "count into a raw [[metric]]"
                )
            elif rule.metric not in raw:
                problems.append(
                    f"{key}: unknown metric {rule.metric!r}; declare it under [[metric]]"
                )
            if rule.metric in seen:
                problems.append(
                    f"{key}: {rule.metric!r} is already counted by this source; "
                    "combine the conditions with or"
                )
            seen.add(rule.metric)
    return problems


def _bounds_problems(key: str, c: BoundsCheck, known: set[str]) -> list[str]:
    """expr, or numerator and denominator (a share); test = binomial needs the latter."""
    share = {"numerator": c.numerator, "denominator": c.denominator}
    given = [k for k, v in share.items() if v is not None]
    if len(given) == 1:
        missing = "denominator" if given == ["numerator"] else "numerator"
        return [f"{key}.{missing}: required with {given[0]}; a share needs both"]
    if given and c.expr is not None:
        return [
            f"{key}.expr: not used with numerator and denominator (the value is "
            "numerator / denominator × 100); remove expr or the two share keys"
        ]
    if c.test == "binomial" and not given:
        return [
            f"{key}.test: 'binomial' needs numerator and denominator (metric expressions, "
            "e.g. numerator = 'malaria_cases_u5', denominator = 'malaria_cases_u5 + "
            "malaria_cases_5plus') in place of expr"
        ]
    if not given and c.expr is None:
        return [f"{key}.expr: required key is missing (or give numerator and denominator)"]
    problems: list[str] = []
    for name, text in ({"expr": c.expr} if not given else share).items():
        problems += _expr_problems(f"{key}.{name}", str(text), known)
    return problems


def _level_problems(key: str, given: list[str], declared: set[str]) -> list[str]:
    unknown = [lv for lv in given if lv not in declared]
    if unknown:
        return [
            f"{key}: unknown level(s) {', '.join(unknown)}; declared: {', '.join(sorted(declared))}"
        ]
    return []


def _expr_problems(key: str, text: str, known: set[str]) -> list[str]:
    try:
        expressions.parse(text, known)
    except expressions.ExpressionError as exc:
        return [f"{key}: {exc}"]
    return []
