"""The documentation keeps up with the code: every config key appears in the reference
configuration (config/digest.toml, commented or not), and every subcommand in the README."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, get_args, get_origin

from pydantic import BaseModel

from digest.cli import COMMANDS
from digest.config import Config

ROOT = Path(__file__).resolve().parent.parent
REFERENCE = (ROOT / "config" / "digest.toml").read_text()
README = (ROOT / "README.md").read_text()


def _models(annotation: Any) -> list[type[BaseModel]]:
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return (
        [m for arg in get_args(annotation) for m in _models(arg)]
        if get_origin(annotation) or get_args(annotation)
        else []
    )


def _keys(model: type[BaseModel], seen: set[type[BaseModel]]) -> set[str]:
    keys: set[str] = set()
    if model in seen:
        return keys
    seen.add(model)
    for name, field in model.model_fields.items():
        if field.exclude:
            continue
        if model is not Config:
            keys.add(field.alias or name)
        for inner in _models(field.annotation):
            keys |= _keys(inner, seen)
    return keys


def test_every_config_key_is_in_the_reference_file() -> None:
    missing = sorted(
        key
        for key in _keys(Config, set())
        if not re.search(rf"^\s*#?\s*{re.escape(key)}\s*=", REFERENCE, re.MULTILINE)
    )
    assert missing == [], f"document these keys in config/digest.toml: {missing}"


def test_every_section_is_in_the_reference_file() -> None:
    for name in Config.model_fields:
        if name == "source":
            continue
        assert re.search(rf"^\s*#?\s*\[\[?{name}\]?\]", REFERENCE, re.MULTILINE), name


def test_every_subcommand_is_in_the_readme() -> None:
    missing = [name for name in COMMANDS if f"digest {name}" not in README]
    assert missing == []
