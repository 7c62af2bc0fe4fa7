"""Loading and checking recipients.csv.

Every problem must be refused with the file, the line and a fix; all problems at once.
The expected values here are the rules of the issue, on a small invented hierarchy.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from digest.config import load_config
from digest.errors import ConfigError
from digest.hierarchy import Hierarchy, build_hierarchy
from digest.recipients import Recipient, build_recipients, config_programmes, load_recipients

LEVELS = ("country", "province", "district", "facility")
PROGRAMMES = {"maternal", "immunization", "malaria"}
HEADER = "email,name,unit,reach,programmes,min_severity"
FIXTURES = Path(__file__).parent / "fixtures"


def make_hierarchy() -> Hierarchy:
    units = [
        ("C", "Country", "", "country"),
        ("P1", "North", "C", "province"),
        ("P2", "South", "C", "province"),
        ("D11", "Hills", "P1", "district"),
        ("D12", "Lakes", "P1", "district"),
        ("D21", "Coast", "P2", "district"),
        ("D22", "Plains", "P2", "district"),
        ("F111", "Hills Clinic A", "D11", "facility"),
        ("F112", "Hills Clinic B", "D11", "facility"),
        ("F121", "Lakes Clinic", "D12", "facility"),
        ("F211", "Coast Clinic", "D21", "facility"),
        ("F221", "Plains Clinic", "D22", "facility"),
    ]
    rows = [
        (line, {"id": uid, "name": name, "parent": parent, "level": level})
        for line, (uid, name, parent, level) in enumerate(units, start=2)
    ]
    return build_hierarchy("units.csv", rows, LEVELS)


H = make_hierarchy()


def write(tmp_path: Path, text: str, *, encoding: str = "utf-8") -> Path:
    path = tmp_path / "recipients.csv"
    path.write_bytes(text.encode(encoding))
    return path


def load(tmp_path: Path, text: str) -> list[Recipient]:
    return load_recipients(write(tmp_path, text), H, PROGRAMMES)


def problems(tmp_path: Path, text: str) -> list[str]:
    with pytest.raises(ConfigError) as info:
        load(tmp_path, text)
    return info.value.problems


# ---- valid files --------------------------------------------------------------------


def test_a_valid_file(tmp_path: Path) -> None:
    got = load(
        tmp_path,
        f"{HEADER}\n"
        "dora@health.example.org,Dora Banda,D11,facility,,\n"
        "pia@health.example.org,Pia Mwale,P1,district,maternal;immunization,warning\n"
        "nat@health.example.org,National team,C,province,*,critical\n",
    )
    assert got == [
        Recipient(
            email="dora@health.example.org",
            name="Dora Banda",
            unit="D11",
            unit_index=H.index["D11"],
            reach="facility",
            programmes=None,
            min_severity="notice",
            line=2,
        ),
        Recipient(
            email="pia@health.example.org",
            name="Pia Mwale",
            unit="P1",
            unit_index=H.index["P1"],
            reach="district",
            programmes=frozenset({"maternal", "immunization"}),
            min_severity="warning",
            line=3,
        ),
        Recipient(
            email="nat@health.example.org",
            name="National team",
            unit="C",
            unit_index=H.index["C"],
            reach="province",
            programmes=None,
            min_severity="critical",
            line=4,
        ),
    ]


def test_optional_columns_may_be_left_out(tmp_path: Path) -> None:
    (r,) = load(tmp_path, "email,name,unit,reach\ndora@x.org,Dora,D11,facility\n")
    assert (r.programmes, r.min_severity) == (None, "notice")


def test_columns_in_any_order_with_padding_and_bom(tmp_path: Path) -> None:
    text = "\ufeffunit , reach,email,name\n D11 , facility , dora@x.org , Dora Banda \n"
    (r,) = load(tmp_path, text)
    assert (r.email, r.name, r.unit, r.reach) == ("dora@x.org", "Dora Banda", "D11", "facility")


def test_reach_at_own_level_is_allowed(tmp_path: Path) -> None:
    (r,) = load(tmp_path, f"{HEADER}\npia@x.org,Pia,P1,province,,\n")
    assert r.reach == "province"


def test_severity_case_and_programme_spacing_are_forgiven(tmp_path: Path) -> None:
    (r,) = load(tmp_path, f"{HEADER}\ndora@x.org,Dora,D11,facility, maternal ; malaria ;,Warning\n")
    assert r.programmes == frozenset({"maternal", "malaria"})
    assert r.min_severity == "warning"


def test_blank_lines_and_empty_rows_are_skipped_and_lines_stay_true(tmp_path: Path) -> None:
    text = f"{HEADER}\n\ndora@x.org,Dora,D11,facility,,\n,,,,,\n\npia@x.org,Pia,P1,district,,\n"
    got = load(tmp_path, text)
    assert [(r.email, r.line) for r in got] == [("dora@x.org", 3), ("pia@x.org", 6)]


def test_a_header_only_file_has_no_recipients(tmp_path: Path) -> None:
    assert load(tmp_path, f"{HEADER}\n") == []


def test_programmes_come_from_the_checks_of_the_config() -> None:
    config = load_config(FIXTURES / "issue_example.toml")
    assert config_programmes(config) == {"maternal", "immunization", "malaria"}


def test_build_recipients_takes_rows_like_build_hierarchy() -> None:
    rows = [(7, {"email": "dora@x.org", "name": "Dora", "unit": "D11", "reach": "facility"})]
    (r,) = build_recipients("recipients.csv", rows, H, PROGRAMMES)
    assert r.line == 7


# ---- each reason is refused with file, line and fix ------------------------------------

ROW_CASES = [
    # (row after the header, words the message must contain)
    ("dora,Dora,D11,facility,,", ["email 'dora'", "name@example.org"]),
    ("dora@example,Dora,D11,facility,,", ["email 'dora@example'", "name@example.org"]),
    ("dora@@x.org,Dora,D11,facility,,", ["email 'dora@@x.org'", "name@example.org"]),
    ("dora banda@x.org,Dora,D11,facility,,", ["email 'dora banda@x.org'", "without spaces"]),
    ("dóra@x.org,Dora,D11,facility,,", ["email 'dóra@x.org'", "ASCII"]),
    (",Dora,D11,facility,,", ["empty email", "name@example.org"]),
    ('dora@x.org,"Dora\nBanda",D11,facility,,', ["name 'Dora\\nBanda'", "one line"]),
    ("dora@x.org,Dora\x07,D11,facility,,", ["name", "control characters"]),
    ("dora@x.org,,D11,facility,,", ["empty name", "person's name"]),
    ("dora@x.org,Dora,D99,facility,,", ["unknown unit 'D99'; use an id from units.csv"]),
    ("dora@x.org,Dora,Hills,facility,,", ["unknown unit 'Hills'", "name of 'D11'"]),
    ("dora@x.org,Dora,,facility,,", ["empty unit", "units.csv"]),
    ("dora@x.org,Dora,D11,ward,,", ["unknown reach 'ward'", "district, facility"]),
    ("dora@x.org,Dora,D11,,,", ["empty reach", "district, facility"]),
    ("dora@x.org,Dora,D11,province,,", ["reach 'province' is above", "district, facility"]),
    ("nat@x.org,Team,C,,,", ["empty reach", "country, province, district, facility"]),
    ("dora@x.org,Dora,D11,facility,hiv,", ["unknown programme(s) 'hiv'", "immunization"]),
    ("dora@x.org,Dora,D11,facility,maternal;HIV;tb,", ["'HIV', 'tb'"]),
    ("dora@x.org,Dora,D11,facility,*;maternal,", ["mixes *", "* alone"]),
    ("dora@x.org,Dora,D11,facility,;,", ["names none", "give *"]),
    ("dora@x.org,Dora,D11,facility,,high", ["unknown min_severity 'high'", "critical, warning"]),
    ("dora@x.org,Dora,D11,facility,,,extra", ["7 fields but the header has 6", "quote"]),
]


@pytest.mark.parametrize(("row", "words"), ROW_CASES, ids=[w[0] for _, w in ROW_CASES])
def test_each_bad_row_is_refused_with_file_line_and_fix(
    tmp_path: Path, row: str, words: list[str]
) -> None:
    text = f"{HEADER}\nok@x.org,Ok,D12,facility,,\n{row}\n"
    (message,) = problems(tmp_path, text)
    assert message.startswith(f"{tmp_path / 'recipients.csv'} line 3: ")
    for word in words:
        assert word in message


def test_a_name_spanning_lines_is_reported_on_its_first_line(tmp_path: Path) -> None:
    text = f'{HEADER}\nok@x.org,Ok,D12,facility,,\ndora@x.org,"Dora\nBanda\nX",D11,facility,,\n'
    (message,) = problems(tmp_path, text)
    assert "recipients.csv line 3: name" in message


def test_a_duplicate_address_names_both_lines(tmp_path: Path) -> None:
    text = f"{HEADER}\ndora@x.org,Dora,D11,facility,,\npia@x.org,Pia,P1,district,,\nDORA@x.org,Dora,D12,facility,,\n"
    (message,) = problems(tmp_path, text)
    assert message.startswith(f"{tmp_path / 'recipients.csv'} line 4: ")
    assert "already appears on line 2" in message
    assert "give the person one home unit" in message


def test_a_duplicate_address_is_reported_even_when_the_row_has_other_problems(
    tmp_path: Path,
) -> None:
    text = f"{HEADER}\ndora@x.org,Dora,D11,facility,,\ndora@x.org,Dora,D99,facility,,\n"
    got = problems(tmp_path, text)
    assert len(got) == 2
    assert all(p.startswith(f"{tmp_path / 'recipients.csv'} line 3: ") for p in got)


def test_every_problem_is_listed_at_once_in_line_order(tmp_path: Path) -> None:
    text = (
        f"{HEADER}\n"
        "dora,Dora,D11,facility,,\n"  # line 2: email
        "pia@x.org,Pia,P1,district,,\n"  # line 3: fine
        "sam@x.org,Sam,D99,facility,hiv,loud\n"  # line 4: unit, programme, severity
        "ann@x.org,Ann,D12,province,,\n"  # line 5: reach above the unit's level
    )
    got = problems(tmp_path, text)
    lines = [p.split(": ", 1)[0].rsplit(" ", 1)[1] for p in got]
    assert lines == ["2", "4", "4", "4", "5"]
    assert "email 'dora'" in got[0]
    assert "unknown unit 'D99'" in got[1]
    assert "unknown programme(s) 'hiv'" in got[2]
    assert "unknown min_severity 'loud'" in got[3]
    assert "reach 'province' is above" in got[4]


# ---- whole-file problems -------------------------------------------------------------


@pytest.mark.parametrize(
    ("header", "words"),
    [
        ("email,name,unit", ["line 1: missing column(s) reach", "header must be email,name,unit,reach["]),
        ("email,name,unit,reach,min_severty", ["line 1: unknown column(s) 'min_severty'"]),
        ("email,name,unit,reach,email", ["line 1: column(s) email appear more than once"]),
    ],
)
def test_a_bad_header_is_refused(tmp_path: Path, header: str, words: list[str]) -> None:
    got = problems(tmp_path, f"{header}\ndora@x.org,Dora,D11,facility\n")
    assert len(got) == 1
    assert got[0].startswith(str(tmp_path / "recipients.csv"))
    for word in words:
        assert word in got[0]


def test_an_empty_file_is_refused(tmp_path: Path) -> None:
    (message,) = problems(tmp_path, "")
    assert "is empty" in message and "header" in message


def test_a_missing_file_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"recipients\.csv: file not found; check \[mail\]"):
        load_recipients(tmp_path / "recipients.csv", H, PROGRAMMES)


def test_a_file_not_in_utf8_is_refused(tmp_path: Path) -> None:
    path = write(tmp_path, f"{HEADER}\ndora@x.org,Dóra,D11,facility,,\n", encoding="latin-1")
    with pytest.raises(ConfigError, match=r"recipients\.csv: not UTF-8 text .* save the file as UTF-8"):
        load_recipients(path, H, PROGRAMMES)


def test_unknown_programme_when_the_config_has_no_checks(tmp_path: Path) -> None:
    path = write(tmp_path, f"{HEADER}\ndora@x.org,Dora,D11,facility,maternal,\n")
    with pytest.raises(ConfigError, match="the config has no checks"):
        load_recipients(path, H, set())
