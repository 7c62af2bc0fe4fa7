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
    Field,
    ValidationError,
    field_validator,
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


class DataConfig(Strict):
    units: Path = Field(description="CSV of the hierarchy: id,name,parent,level[,opened,closed].")
    values: Path = Field(description="Reported values in long form (CSV or Parquet).")
    period: PeriodKind = Field("month", description="Period type: month (2026-10) or week.")
    levels: list[Code] = Field(
        description="Level names, top first; values are captured at the last one.", min_length=1
    )
    max_reject_share: float = Field(
        0.05, ge=0, le=1, description="The run fails when more than this share of rows is rejected."
    )

    @field_validator("levels")
    @classmethod
    def _distinct_levels(cls, levels: list[str]) -> list[str]:
        if len(set(levels)) != len(levels):
            raise ValueError("level names must be distinct")
        return levels


class MetricConfig(Strict):
    code: Code = Field(description="Code used in data files and expressions.")
    label: Line = Field(description="Human label shown in digests.")
    count: bool = Field(True, description="A count: negative values are rejected.")


class DerivedConfig(Strict):
    code: Code = Field(description="Code of the derived metric.")
    label: Line = Field(description="Human label shown in digests.")
    expr: str = Field(description="Expression over metric codes, computed per capture unit.")


class BandConfig(Strict):
    name: Code = Field(description="Name that checks refer to.")
    metric: Code = Field(description="Metric (raw or derived) whose series is banded.")
    method: Literal["mean_sd"] = Field("mean_sd", description="How centre and spread are learned.")
    k: float = Field(
        3.0, gt=0, description="Width of the band in spreads either side of the centre."
    )
    window: int = Field(12, ge=2, description="How many past periods feed the band.")
    gap: int = Field(0, ge=0, description="Periods right before the evaluated one left out.")
    min_points: int = Field(6, ge=2, description="Fewest reported values needed for a band.")
    levels: list[Code] = Field(description="Levels on which the band is learned.", min_length=1)


class CheckBase(Strict):
    name: Code = Field(description="Unique check name.")
    severity: Severity = Field("warning", description="critical, warning or notice.")
    programme: Code = Field(description="Programme tag recipients subscribe to.")
    levels: list[Code] = Field(description="Levels at which the check runs.", min_length=1)
    when: str | None = Field(None, description="Expression that must hold for the check to apply.")
    advice: Line | None = Field(None, description="What to do next, shown with each alert.")


class BandCheck(CheckBase):
    kind: Literal["band"]
    band: Code = Field(description="Name of the [[band]] to compare against.")


class BoundsCheck(CheckBase):
    kind: Literal["bounds"]
    expr: str = Field(description="Expression whose value must stay within [min, max].")
    low: float | None = Field(None, alias="min", description="Lowest allowed value.")
    high: float | None = Field(None, alias="max", description="Highest allowed value.")


class DropoutCheck(CheckBase):
    kind: Literal["dropout"]
    first: Code = Field(description="Metric of the first dose.")
    last: Code = Field(description="Metric of the last dose.")
    low: float | None = Field(None, alias="min", description="Lowest allowed dropout, percent.")
    high: float | None = Field(None, alias="max", description="Highest allowed dropout, percent.")


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


class OutputConfig(Strict):
    dir: Path = Field(Path("out"), description="Default folder for alerts.csv, bands.parquet ...")


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

    data = config.data.model_copy(
        update={"units": resolve(config.data.units), "values": resolve(config.data.values)}
    )
    mail = config.mail.model_copy(
        update={
            "recipients": resolve(config.mail.recipients),
            "templates": resolve(config.mail.templates),
        }
    )
    relay = config.relay.model_copy(update={"ca_file": resolve(config.relay.ca_file)})
    sink = config.sink.model_copy(update={"maildir": resolve(config.sink.maildir)})
    output = config.output.model_copy(update={"dir": resolve(config.output.dir)})
    ledger = config.ledger.model_copy(update={"url": _resolve_sqlite(config.ledger.url, base)})
    return config.model_copy(
        update={
            "data": data,
            "mail": mail,
            "relay": relay,
            "sink": sink,
            "output": output,
            "ledger": ledger,
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
        if b.min_points > b.window:
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
        elif isinstance(c, BoundsCheck | RelationCheck):
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
