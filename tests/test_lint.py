"""`digest lint`: config, hierarchy, values, recipients and templates, one line per problem."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd

from digest import demo_data
from digest.cli import main
from digest.lint import lint

DEMO = Path(__file__).resolve().parent.parent / "demo"


def _demo(tmp_path: Path) -> Path:
    shutil.copyfile(DEMO / "config.toml", tmp_path / "config.toml")
    demo_data.generate(tmp_path / "data")
    return tmp_path / "config.toml"


def test_lint_names_every_rejected_row_with_its_line(tmp_path: Path) -> None:
    config = _demo(tmp_path)
    problems = lint(config)
    bad = pd.read_csv(tmp_path / "data" / "bad_rows.csv")
    rejected_lines = set(bad.loc[bad["reason"] != "exact_duplicate", "line"])
    listed = {int(p.split(" line ")[1].split(":")[0]) for p in problems if " line " in p}
    assert listed and listed <= rejected_lines
    assert any("more rejected rows" in p for p in problems)
    assert main(["lint", "--config", str(config)]) == 1


def test_lint_passes_clean_data_and_reports_bad_recipients(tmp_path: Path) -> None:
    config = _demo(tmp_path)
    values = pd.read_csv(tmp_path / "data" / "values.csv", dtype=str, keep_default_na=False)
    bad = pd.read_csv(tmp_path / "data" / "bad_rows.csv")
    keep = ~pd.Series(range(2, len(values) + 2)).isin(bad["line"]).to_numpy()
    values[keep].to_csv(tmp_path / "data" / "values.csv", index=False)
    assert lint(config) == []
    assert main(["lint", "--config", str(config)]) == 0

    recipients = tmp_path / "data" / "recipients.csv"
    with recipients.open("a") as fh:
        fh.write("someone@health.example.org,Someone,NOWHERE,facility,*,notice\n")
    problems = lint(config)
    assert len(problems) == 1 and "NOWHERE" in problems[0] and "recipients.csv line" in problems[0]


def test_lint_reports_config_errors_with_file_and_key(tmp_path: Path) -> None:
    config = _demo(tmp_path)
    text = config.read_text().replace('period = "month"', 'period = "fortnight"', 1)
    config.write_text(text)
    problems = lint(config)
    assert problems and all(str(config) in p for p in problems)
    assert any("data.period" in p for p in problems)
    assert main(["lint", "--config", str(config)]) == 1
