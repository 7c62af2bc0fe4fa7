"""The reporting hierarchy: units, their levels and parents, read from ``units.csv``.

``units.csv`` has the columns ``id,name,parent,level`` and optionally ``opened,closed``
(ISO dates; a unit is expected to report in a period when it was open on any day of it).
Loading refuses, with every problem listed by file and line, duplicate ids, missing
parents, cycles, more than one root, unknown levels, and a level that does not sit
directly under its parent's level.
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date
from functools import cached_property
from pathlib import Path

import numpy as np
from scipy import sparse

from digest.errors import HierarchyError
from digest.periods import PeriodKind, period_dates

REQUIRED_COLUMNS = ("id", "name", "parent", "level")


@dataclass(frozen=True)
class Hierarchy:
    """Units in a fixed order; every array is indexed by that order."""

    ids: tuple[str, ...]
    names: tuple[str, ...]
    parent: np.ndarray  # int index of the parent, -1 for the root
    level: np.ndarray  # int index into ``levels``
    levels: tuple[str, ...]
    opened: tuple[date | None, ...]
    closed: tuple[date | None, ...]
    index: dict[str, int] = field(repr=False)

    @property
    def size(self) -> int:
        return len(self.ids)

    @property
    def capture_level(self) -> str:
        return self.levels[-1]

    def level_of(self, unit: int) -> str:
        return self.levels[int(self.level[unit])]

    def at_level(self, level: str) -> np.ndarray:
        """Indices of the units at ``level``, in hierarchy order."""
        return np.flatnonzero(self.level == self.levels.index(level))

    def ancestor_at(self, units: np.ndarray, level: str) -> np.ndarray:
        """For each unit, its ancestor (or itself) at ``level``; -1 where there is none."""
        target = self.levels.index(level)
        result = np.asarray(units, dtype=np.int64).copy()
        for _ in range(len(self.levels)):
            above = (result >= 0) & (self.level[np.maximum(result, 0)] > target)
            if not above.any():
                break
            result[above] = self.parent[result[above]]
        result[(result >= 0) & (self.level[np.maximum(result, 0)] != target)] = -1
        return result

    def rollup_matrix(self, members: np.ndarray, level: str) -> sparse.csr_matrix:
        """Sparse 0/1 matrix [units at ``level``] x [members]: 1 where the member lies below."""
        targets = self.at_level(level)
        row_of = np.full(self.size, -1, dtype=np.int64)
        row_of[targets] = np.arange(len(targets))
        ancestors = self.ancestor_at(members, level)
        keep = ancestors >= 0
        rows = row_of[ancestors[keep]]
        cols = np.flatnonzero(keep)
        data = np.ones(len(rows), dtype=np.float64)
        return sparse.csr_matrix((data, (rows, cols)), shape=(len(targets), len(members)))

    def path(self, unit: int) -> list[int]:
        """Ancestors from the top down to ``unit`` (inclusive)."""
        chain = [unit]
        while self.parent[chain[-1]] >= 0:
            chain.append(int(self.parent[chain[-1]]))
        return chain[::-1]

    def path_names(self, unit: int, *, skip_root: bool = True) -> list[str]:
        chain = self.path(unit)
        if skip_root and len(chain) > 1:
            chain = chain[1:]
        return [self.names[u] for u in chain]

    @cached_property
    def children(self) -> dict[int, list[int]]:
        result: dict[int, list[int]] = {}
        for unit, parent in enumerate(self.parent):
            if parent >= 0:
                result.setdefault(int(parent), []).append(unit)
        return result

    def subtree(self, unit: int) -> np.ndarray:
        """``unit`` and every unit below it."""
        found = [unit]
        frontier = [unit]
        while frontier:
            nxt = [c for u in frontier for c in self.children.get(u, [])]
            found += nxt
            frontier = nxt
        return np.array(sorted(found), dtype=np.int64)

    def open_mask(self, units: np.ndarray, periods: np.ndarray, kind: PeriodKind) -> np.ndarray:
        """Boolean [units x periods]: the unit was open on at least one day of the period."""
        bounds = [period_dates(int(p), kind) for p in periods]
        starts = np.array([b[0].toordinal() for b in bounds])
        ends = np.array([b[1].toordinal() for b in bounds])
        far = date.max.toordinal()
        opened = np.array([(self.opened[u] or date.min).toordinal() for u in units])
        closed = np.array([(self.closed[u].toordinal() if self.closed[u] else far) for u in units])
        return (opened[:, None] <= ends[None, :]) & (closed[:, None] > starts[None, :])


def load_hierarchy(path: Path, levels: Sequence[str]) -> Hierarchy:
    """Read and check ``units.csv``; raise HierarchyError listing every problem."""
    try:
        with path.open(newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            columns = reader.fieldnames or []
            rows = [(reader.line_num, row) for row in reader]
    except FileNotFoundError:
        raise HierarchyError(f"{path}: file not found; check [data] units in the config") from None
    missing = [c for c in REQUIRED_COLUMNS if c not in columns]
    if missing:
        raise HierarchyError(
            f"{path}: missing column(s) {', '.join(missing)}; "
            f"the header must be {','.join(REQUIRED_COLUMNS)}[,opened,closed]"
        )
    return build_hierarchy(path, rows, levels)


def build_hierarchy(
    path: Path | str, rows: Sequence[tuple[int, dict[str, str]]], levels: Sequence[str]
) -> Hierarchy:
    problems: list[str] = []
    seen: dict[str, int] = {}
    clean: list[tuple[int, dict[str, str]]] = []
    for line, row in rows:
        uid = (row.get("id") or "").strip()
        if not uid:
            problems.append(f"{path} line {line}: empty id; every unit needs an id")
            continue
        if uid in seen:
            problems.append(f"{path} line {line}: duplicate id {uid!r} (first on line {seen[uid]})")
            continue
        seen[uid] = line
        clean.append((line, row))
    level_index = {name: i for i, name in enumerate(levels)}
    for line, row in clean:
        level = (row.get("level") or "").strip()
        if level not in level_index:
            problems.append(
                f"{path} line {line}: unknown level {level!r} for {row['id'].strip()!r}; "
                f"expected one of {', '.join(levels)} ([data] levels)"
            )
    roots = [
        (line, row["id"].strip()) for line, row in clean if not (row.get("parent") or "").strip()
    ]
    if len(roots) > 1:
        listed = ", ".join(f"{uid!r} (line {line})" for line, uid in roots)
        problems.append(f"{path}: more than one root (unit without parent): {listed}; keep one")
    elif not roots and clean:
        problems.append(f"{path}: no root; the top unit must have an empty parent")
    for line, row in clean:
        parent = (row.get("parent") or "").strip()
        if parent and parent not in seen:
            problems.append(
                f"{path} line {line}: parent {parent!r} of {row['id'].strip()!r} is not in the file"
            )
    if problems:
        raise HierarchyError(problems)
    ids = tuple(row["id"].strip() for _, row in clean)
    index = {uid: i for i, uid in enumerate(ids)}
    parent = np.array(
        [index[p] if (p := (row.get("parent") or "").strip()) else -1 for _, row in clean],
        dtype=np.int64,
    )
    level = np.array([level_index[row["level"].strip()] for _, row in clean], dtype=np.int64)
    problems += _cycle_problems(path, clean, parent)
    if problems:
        raise HierarchyError(problems)
    for i, (line, _row) in enumerate(clean):
        if parent[i] < 0:
            if level[i] != 0:
                problems.append(
                    f"{path} line {line}: the root {ids[i]!r} is a {levels[level[i]]}; "
                    f"the root must be at the top level {levels[0]!r}"
                )
        elif level[i] != level[parent[i]] + 1:
            expected = f"directly under a {levels[level[i] - 1]}" if level[i] else "at the root"
            problems.append(
                f"{path} line {line}: {ids[i]!r} is a {levels[level[i]]} under the "
                f"{levels[level[parent[i]]]} {ids[parent[i]]!r}; a {levels[level[i]]} must sit "
                f"{expected}"
            )
    opened = tuple(_date(path, line, row, "opened", problems) for line, row in clean)
    closed = tuple(_date(path, line, row, "closed", problems) for line, row in clean)
    for i, (line, _) in enumerate(clean):
        if opened[i] and closed[i] and closed[i] < opened[i]:
            problems.append(f"{path} line {line}: closed {closed[i]} is before opened {opened[i]}")
    if problems:
        raise HierarchyError(problems)
    names = tuple((row.get("name") or "").strip() or row["id"].strip() for _, row in clean)
    return Hierarchy(ids, names, parent, level, tuple(levels), opened, closed, index)


def _cycle_problems(
    path: Path | str, clean: Sequence[tuple[int, dict[str, str]]], parent: np.ndarray
) -> list[str]:
    problems = []
    reported: set[int] = set()
    for start in range(len(parent)):
        seen_here: list[int] = []
        node = start
        while node >= 0 and node not in seen_here:
            seen_here.append(node)
            node = int(parent[node])
        if node >= 0:  # came back to a node on this walk: a cycle
            cycle = seen_here[seen_here.index(node) :]
            if not reported.intersection(cycle):
                reported.update(cycle)
                ids = " -> ".join(clean[i][1]["id"].strip() for i in [*cycle, node])
                problems.append(
                    f"{path} line {clean[node][0]}: cycle in parents: {ids}; "
                    "every chain of parents must end at the root"
                )
    return problems


def _date(
    path: Path | str, line: int, row: dict[str, str], column: str, problems: list[str]
) -> date | None:
    text = (row.get(column) or "").strip()
    if not text:
        return None
    try:
        return date.fromisoformat(text)
    except ValueError:
        problems.append(f"{path} line {line}: {column} {text!r} is not an ISO date like 2024-03-01")
        return None
