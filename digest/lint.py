"""``digest lint``: every check a run would make on config and data, without running it.

Returns one line per problem; an empty list means the run would start cleanly.
"""

from __future__ import annotations

from pathlib import Path

from digest import sources
from digest.config import Config, load_config
from digest.errors import ConfigError, DigestError
from digest.hierarchy import Hierarchy
from digest.loading import assemble, check_rows
from digest.render import check_templates, make_environment

MAX_REJECTS_LISTED = 20


def lint(config_path: Path) -> list[str]:
    try:
        config = load_config(config_path)
    except ConfigError as exc:
        return exc.problems
    try:
        hierarchy = sources.load_units(config)
    except ConfigError as exc:
        return exc.problems
    except DigestError as exc:  # e.g. the units query cannot run
        return [str(exc)]
    problems = _values_problems(config, hierarchy)
    problems += _mail_problems(config, hierarchy)
    return problems


def _values_problems(config: Config, hierarchy: Hierarchy) -> list[str]:
    label = sources.source_label(config.data.values, "values")
    try:
        parts = [check_rows(f, src, config, hierarchy) for src, f in sources.value_chunks(config)]
        parts += sources.records_parts(config, hierarchy)
    except DigestError as exc:
        return [str(exc)]
    loaded = assemble(parts, config, hierarchy)
    rejects = loaded.rejects
    problems = [
        f"{row.source} line {row.line}: {row.reason} "
        f"(unit {row.unit!r}, metric {row.metric!r}, period {row.period!r}, value {row.value!r})"
        for row in rejects.head(MAX_REJECTS_LISTED).itertuples()
    ]
    if len(rejects) > MAX_REJECTS_LISTED:
        problems.append(
            f"{label}: ... and {len(rejects) - MAX_REJECTS_LISTED} more rejected "
            "rows; `digest run` writes them all to rejects.csv"
        )
    share = loaded.stats.reject_share
    if share > config.data.max_reject_share:
        problems.append(
            f"{label}: {share:.1%} of rows rejected, above max_reject_share "
            f"{config.data.max_reject_share:.1%}: a run would fail"
        )
    return problems


def _mail_problems(config: Config, hierarchy: Hierarchy) -> list[str]:
    problems: list[str] = []
    if config.mail.recipients is not None:
        from digest.recipients import load_recipients

        programmes = {c.programme for c in config.check}
        try:
            load_recipients(config.mail.recipients, hierarchy, programmes)
        except ConfigError as exc:
            problems += exc.problems
    try:
        check_templates(make_environment(config.mail.templates))
    except ConfigError as exc:
        problems += exc.problems
    return problems
