"""The run summary printed after ``digest run``: what was read, what was found, how long."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import TextIO

import pandas as pd

from digest.config import SEVERITY_RANK
from digest.pipeline import RunResult


def summary_lines(result: RunResult, paths: Mapping[str, Path] | None = None) -> list[str]:
    stats = result.loaded.stats
    alerts = result.alerts
    lines = [
        f"run {result.run_id}: period {result.period}",
        f"rows read {stats.rows_read:,}, loaded {stats.rows_loaded:,}, "
        f"rejected {stats.rows_rejected:,} ({stats.reject_share:.2%}), "
        f"exact duplicates collapsed {stats.duplicates_collapsed:,}",
        f"alerts: {len(alerts)}",
    ]
    if len(alerts):
        lines += _table("by severity", alerts["severity"], order=list(SEVERITY_RANK))
        lines += _table("by level", alerts["level"], order=list(result.config.data.levels))
        lines += _table("by check", alerts["check"], order=[c.name for c in result.config.check])
    timing = ", ".join(f"{name} {seconds:.2f}s" for name, seconds in result.timings.items())
    lines.append(f"time per stage: {timing}")
    if len(result.loaded.rejects):
        reasons = result.loaded.rejects["reason"].str.split(";").str[0].str.split(":").str[0]
        lines += _table("rejected rows by reason", reasons)
    for name, path in (paths or {}).items():
        lines.append(f"{name}: {path}")
    return lines


def _table(title: str, column: pd.Series, order: list[str] | None = None) -> list[str]:
    counts = column.value_counts()
    keys = [k for k in (order or []) if k in counts.index]
    keys += [k for k in counts.index if k not in keys]
    width = max(len(str(k)) for k in keys)
    return [f"  {title}:"] + [f"    {k!s:<{width}}  {counts[k]:>6}" for k in keys]


def print_summary(
    result: RunResult, paths: Mapping[str, Path] | None = None, out: TextIO | None = None
) -> None:
    import sys

    print("\n".join(summary_lines(result, paths)), file=out or sys.stdout)


def digest_table_lines(outcome) -> list[str]:  # type: ignore[no-untyped-def]
    """Recipients with their alert counts and where their digest went."""
    if not outcome.digests:
        return ["digests: none (no recipient has alerts)"]
    delivered = {r.id: r.status for r in outcome.delivery}
    width = max(len(p.recipient.email) for p in outcome.digests)
    lines = [f"digests: {len(outcome.digests)}"]
    lines.append(f"  {'recipient':<{width}}  {'unit':<24} {'alerts':>6}  delivery")
    for p in outcome.digests:
        unit = p.recipient.unit
        status = delivered.get(p.outbox_id, "queued")
        lines.append(f"  {p.recipient.email:<{width}}  {unit:<24} {len(p.alerts):>6}  {status}")
    if outcome.unrouted is not None and len(outcome.unrouted):
        lines.append(f"alerts that reach nobody: {len(outcome.unrouted)}")
    if outcome.maildir is not None:
        lines.append(f"maildir: {outcome.maildir}")
    return lines


def print_digest_table(outcome, out: TextIO | None = None) -> None:  # type: ignore[no-untyped-def]
    import sys

    print("\n".join(digest_table_lines(outcome)), file=out or sys.stdout)
