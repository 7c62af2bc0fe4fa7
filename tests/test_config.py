"""Configuration: the issue's example loads; every error names file, key path and expectation."""

from __future__ import annotations

import contextlib
import ipaddress
import tomllib
from pathlib import Path
from typing import Any

import pytest

from digest.config import (
    BandCheck,
    BoundsCheck,
    DropoutCheck,
    RelationCheck,
    SilenceCheck,
    config_from_dict,
    load_config,
)
from digest.errors import ConfigError

KIND_CLASSES = {
    "band": BandCheck,
    "bounds": BoundsCheck,
    "dropout": DropoutCheck,
    "relation": RelationCheck,
    "silence": SilenceCheck,
}


def problems_of(raw: dict[str, Any], path: Path) -> list[str]:
    with pytest.raises(ConfigError) as info:
        config_from_dict(raw, path)
    return info.value.problems


def one_problem(raw: dict[str, Any], path: Path, *needles: str) -> str:
    """The single problem reported; it names the file and contains every needle."""
    problems = problems_of(raw, path)
    assert len(problems) == 1, problems
    line = problems[0]
    assert line.startswith(f"{path}: "), line
    for needle in needles:
        assert needle in line, (needle, line)
    return line


# ---- the example file ---------------------------------------------------------------


def test_issue_example_loads_as_written(example_config_path: Path) -> None:
    config = load_config(example_config_path)
    # independent reading of the same file with the standard library's TOML parser
    raw = tomllib.loads(example_config_path.read_text(encoding="utf-8"))
    assert [c.name for c in config.check] == [c["name"] for c in raw["check"]]
    assert [c.name for c in config.check] == [
        "anc1_out_of_band",
        "anc4_above_anc1",
        "penta_dropout",
        "malaria_u5_share",
        "anc1_silent",
        "rdt_stockouts",
    ]
    for check, table in zip(config.check, raw["check"], strict=True):
        assert isinstance(check, KIND_CLASSES[table["kind"]])
        assert check.severity == table["severity"]
        assert check.programme == table["programme"]
        assert check.levels == table["levels"]
        assert check.when == table.get("when")
        for key, attr in (("min", "low"), ("max", "high")):
            if key in table:
                assert getattr(check, attr) == table[key]
    dropout = config.check[2]
    assert isinstance(dropout, DropoutCheck)
    assert (dropout.first, dropout.last, dropout.low, dropout.high) == (
        "penta1_doses",
        "penta3_doses",
        0,
        10,  # UNICEF, The Progress of Nations 2000: dropout above 10 % signals a problem
    )
    share = config.check[3]
    assert isinstance(share, BoundsCheck)
    assert share.high == 35  # under-five share upper limit: common practice, no source
    assert config.data.levels == ["country", "province", "district", "facility"]
    assert config.capture_level == "facility"
    assert [m.code for m in config.metric] == [m["code"] for m in raw["metric"]]
    assert config.metric_labels["rdt_stockout_sites"] == "Facilities with a rapid-test stock-out"
    band = config.band_named("anc1_usual")
    assert (band.method, band.k, band.window, band.min_points) == ("mean_sd", 3.0, 12, 6)
    # relative paths are resolved against the file's own folder
    assert config.data.units == example_config_path.parent / "units.csv"
    assert config.data.values == example_config_path.parent / "values.csv"


# ---- errors from validation: file, dotted key, what was expected --------------------


def test_wrong_type_names_dotted_key(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][2]["min"] = "ten"
    one_problem(example_raw, tmp_path / "digest.toml", "check[2].min", "number", "'ten'")


def test_bad_choice_names_key_and_choices(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["data"]["period"] = "day"
    one_problem(example_raw, tmp_path / "d.toml", "data.period", "'month' or 'week'", "'day'")


def test_unknown_top_level_key(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["smtp"] = {"host": "mail.example.org"}
    one_problem(example_raw, tmp_path / "d.toml", "smtp: unknown key")


@pytest.mark.parametrize(
    ("where", "key", "path"),
    [
        (("data",), "periods", "data.periods"),
        (("check", 0), "colour", "check[0].colour"),
        (("metric", 1), "unit", "metric[1].unit"),
        (("band", 0), "windows", "band[0].windows"),
    ],
)
def test_unknown_nested_keys(
    example_raw: dict[str, Any], tmp_path: Path, where: tuple[Any, ...], key: str, path: str
) -> None:
    table: Any = example_raw
    for part in where:
        table = table[part]
    table[key] = 1
    one_problem(example_raw, tmp_path / "d.toml", f"{path}: unknown key")


def test_missing_required_key(example_raw: dict[str, Any], tmp_path: Path) -> None:
    del example_raw["data"]["levels"]
    one_problem(example_raw, tmp_path / "d.toml", "data.levels", "required key is missing")


def test_bad_code_and_range(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["metric"][0]["code"] = "anc 1"
    example_raw["band"][0]["k"] = 0
    problems = problems_of(example_raw, tmp_path / "d.toml")
    assert any("metric[0].code" in p and "plain code" in p for p in problems), problems
    assert any("band[0].k" in p and "greater than 0" in p for p in problems), problems


def test_every_problem_listed_at_once(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["data"]["period"] = "day"
    example_raw["check"][0]["severity"] = "urgent"
    example_raw["extra"] = 1
    problems = problems_of(example_raw, tmp_path / "d.toml")
    assert len(problems) == 3
    assert {p.split(": ")[1] for p in problems} == {"data.period", "check[0].severity", "extra"}


def test_load_config_file_errors(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="file not found"):
        load_config(tmp_path / "absent.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[data\nunits = 1\n", encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        load_config(bad)
    assert str(bad) in str(info.value) and "not valid TOML" in str(info.value)


# ---- cross-field errors -------------------------------------------------------------


def test_unknown_band(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][0]["band"] = "anc1_unusual"
    one_problem(example_raw, tmp_path / "d.toml", "check[0].band", "'anc1_unusual'")


def test_unknown_level(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][1]["levels"] = ["facility", "region"]
    one_problem(example_raw, tmp_path / "d.toml", "check[1].levels", "region", "declared")


def test_band_check_on_level_band_not_learned(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][0]["levels"] = ["facility", "province"]
    one_problem(
        example_raw,
        tmp_path / "d.toml",
        "check[0].levels",
        "'anc1_usual'",
        "not learned at province",
    )


@pytest.mark.parametrize(
    ("index", "field", "text"),
    [
        (1, "expr", "anc4_visits.real <= anc1_visits"),
        (3, "expr", "malaria_cases_u5 / __import__('os')"),
        (2, "when", "penta1_doses >= 'twenty'"),
        (3, "expr", "malaria_cases_u5 / malaria_cases_u6"),
    ],
)
def test_bad_expression_names_the_text(
    example_raw: dict[str, Any], tmp_path: Path, index: int, field: str, text: str
) -> None:
    example_raw["check"][index][field] = text
    one_problem(example_raw, tmp_path / "d.toml", f"check[{index}].{field}", repr(text))


def test_bad_derived_expression(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["derived"][0]["expr"] = "rdt_stockout_days[0] > 0"
    one_problem(example_raw, tmp_path / "d.toml", "derived[0].expr", "rdt_stockout_days[0]")


def test_min_above_max(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][2]["min"] = 20
    one_problem(example_raw, tmp_path / "d.toml", "check[2]", "min (20", "max (10")


def test_bounds_without_limits(example_raw: dict[str, Any], tmp_path: Path) -> None:
    del example_raw["check"][5]["max"]
    one_problem(example_raw, tmp_path / "d.toml", "check[5]", "min, max or both")


def test_duplicate_names(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][1]["name"] = "anc1_out_of_band"
    example_raw["band"].append(dict(example_raw["band"][0]))
    example_raw["metric"].append({"code": "anc1_visits", "label": "again"})
    problems = problems_of(example_raw, tmp_path / "d.toml")
    assert any("check name 'anc1_out_of_band' is used twice" in p for p in problems), problems
    assert any("band name 'anc1_usual' is used twice" in p for p in problems), problems
    assert any("code 'anc1_visits' is declared twice" in p for p in problems), problems
    assert all(p.startswith(f"{tmp_path / 'd.toml'}: ") for p in problems)


def test_unknown_metrics_in_checks_and_bands(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["check"][2]["last"] = "penta9_doses"
    example_raw["check"][4]["metric"] = "anc9_visits"
    example_raw["band"][0]["metric"] = "anc0_visits"
    problems = problems_of(example_raw, tmp_path / "d.toml")
    assert any(p.endswith("check[2].last: unknown metric 'penta9_doses'") for p in problems)
    assert any(p.endswith("check[4].metric: unknown metric 'anc9_visits'") for p in problems)
    assert any("band[0].metric: unknown metric 'anc0_visits'" in p for p in problems)


def test_impossible_windows(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["band"][0]["min_points"] = 13
    example_raw["check"][4]["min_history"] = 13
    problems = problems_of(example_raw, tmp_path / "d.toml")
    assert any("band[0].min_points" in p and "window = 12" in p for p in problems), problems
    assert any("check[4].min_history" in p and "window = 12" in p for p in problems), problems


def test_derived_may_only_use_earlier_codes(example_raw: dict[str, Any], tmp_path: Path) -> None:
    example_raw["derived"].insert(
        0, {"code": "twice", "label": "twice", "expr": "rdt_stockout_sites * 2"}
    )
    one_problem(example_raw, tmp_path / "d.toml", "derived[0].expr", "rdt_stockout_sites")


# ---- relay security -----------------------------------------------------------------


@pytest.mark.parametrize("host", ["mail.example.org", "10.0.0.1", "192.168.1.10", "::2"])
def test_plaintext_relay_refused_for_non_loopback(
    example_raw: dict[str, Any], tmp_path: Path, host: str
) -> None:
    with contextlib.suppress(ValueError):  # a host name is not an address
        assert not ipaddress.ip_address(host).is_loopback  # stdlib agrees it is not loopback
    example_raw["relay"] = {"host": host, "security": "none"}
    one_problem(example_raw, tmp_path / "d.toml", "relay.security", "loopback", repr(host))


@pytest.mark.parametrize("host", ["localhost", "127.0.0.1", "127.0.0.53", "::1"])
def test_plaintext_relay_allowed_for_loopback(
    example_raw: dict[str, Any], tmp_path: Path, host: str
) -> None:
    # 127.0.0.0/8 and ::1 are loopback (RFC 1122 §3.2.1.3, RFC 4291 §2.5.3); ipaddress agrees
    if host != "localhost":
        assert ipaddress.ip_address(host).is_loopback
    example_raw["relay"] = {"host": host, "security": "none", "port": 25}
    assert config_from_dict(example_raw, tmp_path / "d.toml").relay.security == "none"


def test_relay_defaults_are_verified_tls(example_raw: dict[str, Any], tmp_path: Path) -> None:
    relay = config_from_dict(example_raw, tmp_path / "d.toml").relay
    # 587 is the message submission port with STARTTLS (RFC 6409 §3.1; from memory)
    assert (relay.security, relay.port) == ("starttls", 587)


def test_password_comes_from_environment(
    example_raw: dict[str, Any], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    example_raw["relay"] = {"host": "mail.example.org", "password_env": "DIGEST_TEST_PW"}
    relay = config_from_dict(example_raw, tmp_path / "d.toml").relay
    monkeypatch.delenv("DIGEST_TEST_PW", raising=False)
    with pytest.raises(ConfigError, match="DIGEST_TEST_PW is not set"):
        relay.password()
    monkeypatch.setenv("DIGEST_TEST_PW", "s3cret")
    assert relay.password() == "s3cret"
