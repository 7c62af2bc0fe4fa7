"""Recipients: who gets a digest, read from ``recipients.csv``.

The file has the columns ``email,name,unit,reach`` and optionally ``programmes,min_severity``:

- ``unit`` is the id (from ``units.csv``) of the person's home unit;
- ``reach`` is the deepest level the person wants to hear about, at or below the home
  unit's level (a district officer: ``facility``; a provincial lead: ``district``);
- ``programmes`` is ``*`` (all) or a ``;``-separated list of the programme tags that the
  config's checks use; empty means ``*``;
- ``min_severity`` is ``critical``, ``warning`` or ``notice``; empty means ``notice``.

An address may appear on one row only: each person has one home unit and gets one digest.
Loading refuses the file with every problem listed, one line each, naming the file, the
line and the fix.
"""

from __future__ import annotations

import csv
from collections.abc import Collection, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from digest.config import SEVERITY_RANK, Config, _email_address, _one_line
from digest.errors import ConfigError
from digest.hierarchy import Hierarchy

REQUIRED_COLUMNS = ("email", "name", "unit", "reach")
OPTIONAL_COLUMNS = ("programmes", "min_severity")
HEADER_HINT = "email,name,unit,reach[,programmes,min_severity]"

# One parsed CSV row as csv.DictReader gives it: None keys extra fields, None values missing ones.
Row = Mapping[str | None, str | list[str] | None]
ALL_PROGRAMMES = "*"
DEFAULT_SEVERITY = "notice"


@dataclass(frozen=True)
class Recipient:
    """One person: where they sit, how deep they look, what they follow."""

    email: str
    name: str
    unit: str  # unit id
    unit_index: int  # index into the Hierarchy
    reach: str  # level name, at or below the home unit's level
    programmes: frozenset[str] | None  # None = every programme ("*")
    min_severity: str  # "critical" | "warning" | "notice"
    line: int  # line in recipients.csv, for messages


def config_programmes(config: Config) -> frozenset[str]:
    """The programme tags a recipient may follow: those used by the config's checks."""
    return frozenset(check.programme for check in config.check)


def load_recipients(
    path: Path, hierarchy: Hierarchy, programmes: Collection[str]
) -> list[Recipient]:
    """Read and check ``recipients.csv``; raise ConfigError listing every problem."""
    try:
        with path.open(newline="", encoding="utf-8-sig") as fh:
            rows = _read_rows(path, csv.reader(fh))
    except FileNotFoundError:
        raise ConfigError(f"{path}: file not found; check [mail] recipients in the config") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start}); save the file as UTF-8"
        ) from None
    except csv.Error as exc:
        raise ConfigError(f"{path}: not readable as CSV ({exc}); check the quoting") from None
    return build_recipients(path, rows, hierarchy, programmes)


def build_recipients(
    path: Path | str,
    rows: Sequence[tuple[int, Row]],
    hierarchy: Hierarchy,
    programmes: Collection[str],
) -> list[Recipient]:
    """Check parsed rows (line number, column -> text); raise ConfigError listing every problem."""
    problems: list[str] = []
    recipients: list[Recipient] = []
    first_line: dict[str, int] = {}
    known = frozenset(programmes)
    for line, row in rows:
        if _blank(row):
            continue  # a spreadsheet's trailing ",,,," row carries nothing
        here: list[str] = []
        recipient = _parse_row(row, line, hierarchy, known, here)
        email = _cell(row, "email").lower()
        if email in first_line:
            here.append(
                f"address {_cell(row, 'email')!r} already appears on line {first_line[email]}; "
                "an address may appear once; give the person one home unit"
            )
        elif email:
            first_line[email] = line
        problems += [f"{path} line {line}: {p}" for p in here]
        if recipient is not None and not here:
            recipients.append(recipient)
    if problems:
        raise ConfigError(problems)
    return recipients


# ---- header and rows -----------------------------------------------------------------


def _read_rows(path: Path, reader: Iterator[list[str]]) -> list[tuple[int, Row]]:
    """Rows keyed by column, each with the line it starts on (a quoted field may span lines).

    Like csv.DictReader: blank lines are skipped, extra fields go under the key None and
    missing fields are None.
    """
    header = next(reader, None)
    if not header:
        raise ConfigError(f"{path}: the file is empty; the first line must be the header {HEADER_HINT}")
    _check_header(path, header)
    rows: list[tuple[int, Row]] = []
    while True:
        start = reader.line_num + 1  # type: ignore[attr-defined]  # csv reader objects have it
        fields = next(reader, None)
        if fields is None:
            return rows
        if fields:
            row: dict[str | None, str | list[str] | None] = dict(zip(header, fields, strict=False))
            row.update({column: None for column in header[len(fields):]})
            if len(fields) > len(header):
                row[None] = fields[len(header):]
            rows.append((start, row))


def _check_header(path: Path, columns: list[str]) -> None:
    stripped = [c.strip() for c in columns]
    problems = []
    missing = [c for c in REQUIRED_COLUMNS if c not in stripped]
    if missing:
        problems.append(f"missing column(s) {', '.join(missing)}")
    unknown = [c for c in stripped if c not in REQUIRED_COLUMNS + OPTIONAL_COLUMNS]
    if unknown:
        problems.append(f"unknown column(s) {', '.join(repr(c) for c in unknown)}")
    repeated = sorted({c for c in stripped if stripped.count(c) > 1})
    if repeated:
        problems.append(f"column(s) {', '.join(repeated)} appear more than once")
    if problems:
        raise ConfigError(
            [f"{path} line 1: {p}; the header must be {HEADER_HINT}" for p in problems]
        )


def _blank(row: Row) -> bool:
    return all(not (v.strip() if isinstance(v, str) else v) for v in row.values())


def _cell(row: Row, column: str) -> str:
    """The stripped text of ``column``, tolerating padded header names and short rows."""
    for key, value in row.items():
        if key is not None and key.strip() == column:
            return value.strip() if isinstance(value, str) else ""
    return ""


def _parse_row(
    row: Row, line: int, hierarchy: Hierarchy, known_programmes: frozenset[str], problems: list[str]
) -> Recipient | None:
    """Parse one row, appending a message per problem; None when there was any."""
    before = len(problems)
    extra = row.get(None)
    if extra:
        width = len([k for k in row if k is not None])
        problems.append(
            f"{width + len(extra)} fields but the header has {width}; "
            "quote values that contain commas"
        )
    email = _email(_cell(row, "email"), problems)
    name = _name(_cell(row, "name"), problems)
    unit = _unit(_cell(row, "unit"), hierarchy, problems)
    reach = _reach(_cell(row, "reach"), unit, hierarchy, problems)
    followed = _programmes(_cell(row, "programmes"), known_programmes, problems)
    severity = _severity(_cell(row, "min_severity"), problems)
    if len(problems) > before or unit is None:
        return None
    return Recipient(
        email=email,
        name=name,
        unit=hierarchy.ids[unit],
        unit_index=unit,
        reach=reach,
        programmes=followed,
        min_severity=severity,
        line=line,
    )


def _email(text: str, problems: list[str]) -> str:
    if not text:
        problems.append("empty email; every row needs an address like name@example.org")
        return ""
    try:
        return _email_address(text)
    except ValueError as exc:
        problems.append(f"email {text!r} {exc}")
        return ""


def _name(text: str, problems: list[str]) -> str:
    if not text:
        problems.append("empty name; give the person's name as the digest should greet them")
        return ""
    try:
        return _one_line(text)
    except ValueError as exc:
        problems.append(f"name {text!r} {exc}; keep it on one line")
        return ""


def _unit(text: str, hierarchy: Hierarchy, problems: list[str]) -> int | None:
    if not text:
        problems.append("empty unit; use an id from units.csv")
        return None
    if text in hierarchy.index:
        return hierarchy.index[text]
    hint = ""
    by_name = [i for i, name in enumerate(hierarchy.names) if name.casefold() == text.casefold()]
    if len(by_name) == 1:
        hint = f" (that is the name of {hierarchy.ids[by_name[0]]!r})"
    problems.append(f"unknown unit {text!r}; use an id from units.csv{hint}")
    return None


def _reach(text: str, unit: int | None, hierarchy: Hierarchy, problems: list[str]) -> str:
    levels = hierarchy.levels
    own = 0 if unit is None else int(hierarchy.level[unit])
    allowed = ", ".join(levels[own:])
    if not text:
        problems.append(f"empty reach; give the deepest level to hear about: one of {allowed}")
    elif text not in levels:
        problems.append(f"unknown reach {text!r}; use a level from [data] levels: {allowed}")
    elif unit is not None and levels.index(text) < own:
        problems.append(
            f"reach {text!r} is above the level of unit {hierarchy.ids[unit]!r} ({levels[own]}); "
            f"reach is the deepest level to hear about: use one of {allowed}"
        )
    return text


def _programmes(text: str, known: frozenset[str], problems: list[str]) -> frozenset[str] | None:
    """None for every programme (``*`` or empty), else the set named."""
    if not text or text == ALL_PROGRAMMES:
        return None
    items = [p.strip() for p in text.split(";") if p.strip()]
    if not items:
        problems.append(f"programmes {text!r} names none; give * or a ;-separated list")
    elif ALL_PROGRAMMES in items:
        problems.append(f"programmes {text!r} mixes * with names; give * alone or a list")
    elif unknown := [p for p in dict.fromkeys(items) if p not in known]:
        listing = ", ".join(sorted(known)) or "(none: the config has no checks)"
        problems.append(
            f"unknown programme(s) {', '.join(repr(p) for p in unknown)}; use * or a ;-separated "
            f"list of the programmes that checks use: {listing}"
        )
    return frozenset(items)


def _severity(text: str, problems: list[str]) -> str:
    if not text:
        return DEFAULT_SEVERITY
    if text.lower() not in SEVERITY_RANK:
        problems.append(
            f"unknown min_severity {text!r}; use {', '.join(SEVERITY_RANK)} (or leave it empty)"
        )
    return text.lower()
