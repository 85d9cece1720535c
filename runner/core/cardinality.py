"""Batch-size advice for `weir check`: steps that group or split rows by a nearly unique column.

A SQL step that groups (`GROUP BY`) or splits (`PARTITION BY`) by a column
whose values are almost all distinct, such as an id or a raw timestamp, makes
about one group per row: the work is cut into batches of one. Common practice
(a rule of thumb, not a standard) is to group and split by low-cardinality
attributes such as a date, a category or a method, never by ids or raw
timestamps; a timestamp is truncated first (`date_trunc('hour', started_at)`).

The judgement is made on a small sample of the latest input: the newest files
of each file input, at most `SAMPLE_ROWS` rows, read lazily. It is advice:
it never fails `weir check`, and a workspace without input files yet gets
none.
"""

from __future__ import annotations

import glob
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from runner.core.sqlcheck import strip_sql
from runner.errors import Problem
from runner.model.spec import FileInput, Job, SqlStep

if TYPE_CHECKING:
    import polars as pl

SAMPLE_ROWS = 10_000  # rows read from the newest files of an input
SAMPLE_FILES = 8  # at most this many files are opened
MIN_ROWS = 100  # a smaller sample says nothing about how many distinct values there are
NEARLY_UNIQUE = 0.5  # distinct values / sampled rows above this: about one group per row

_CLAUSE = re.compile(r"\b(GROUP|PARTITION)\s+BY\b", re.I)
_END = re.compile(
    r"\b(HAVING|ORDER|LIMIT|OFFSET|FETCH|WINDOW|QUALIFY|UNION|INTERSECT|EXCEPT|ROWS|RANGE|GROUPS|SELECT|FROM|WHERE)\b",
    re.I)
_COLUMN = re.compile(r'^(?:("?)([A-Za-z_]\w*)\1\.)?("?)([A-Za-z_]\w*)\3$')
_PLACEHOLDER = re.compile(r"\{[^{}]*\}")


@dataclass(frozen=True)
class Grouping:
    """A bare column named in a GROUP BY or PARTITION BY list."""

    clause: str  # "groups" or "splits"
    table: str | None  # the qualifier, when written as table.column
    column: str


def groupings(sql: str) -> list[Grouping]:
    """The bare columns that `sql` groups or splits by (expressions and ordinals are skipped)."""
    text = strip_sql(sql)
    out: list[Grouping] = []
    for m in _CLAUSE.finditer(text):
        clause = "groups" if m.group(1).upper() == "GROUP" else "splits"
        for item in _items(text, m.end()):
            c = _COLUMN.match(item.strip())
            if c and c.group(4).upper() not in ("ALL", "ROLLUP", "CUBE"):
                out.append(Grouping(clause, c.group(2), c.group(4)))
    return out


def _items(text: str, start: int) -> list[str]:
    """The comma-separated list starting at `start`, up to the clause's end (depth-aware)."""
    items, depth, begin, i = [], 0, start, start
    while i < len(text):
        ch = text[i]
        if ch == "(":
            depth += 1
        elif ch == ")":
            if depth == 0:
                break
            depth -= 1
        elif ch == ";" and depth == 0:
            break
        elif ch == "," and depth == 0:
            items.append(text[begin:i])
            begin = i + 1
        elif (depth == 0 and ch.isalpha() and not (text[i - 1].isalnum() or text[i - 1] == "_")
              and _END.match(text, i)):
            break
        i += 1
    items.append(text[begin:i])
    return [s for s in items if s.strip()]


def latest_files(root: Path, template: str, limit: int = SAMPLE_FILES) -> list[str]:
    """The newest files an input template can match (every placeholder as `*`), newest first."""
    wild = _PLACEHOLDER.sub("*", template)
    full = wild if os.path.isabs(wild) else os.path.join(root, wild)
    found = []
    for path in glob.glob(full, recursive=True):
        try:
            st = os.stat(path)
        except OSError:
            continue
        if os.path.isfile(path):
            found.append((st.st_mtime_ns, path))
    found.sort(reverse=True)  # newest first; among equal times, the path that sorts last (a later date)
    return [p for _, p in found[:limit]]


def sample(paths: list[str], fmt: str | None, columns: set[str], rows: int = SAMPLE_ROWS) -> pl.DataFrame | None:
    """Up to `rows` rows of the wanted columns from `paths`, in order, read lazily (None if none)."""
    import polars as pl

    from runner.io.readers import file_format

    frames = []
    left = rows
    for path in paths:
        kind = file_format(path, fmt)
        if kind == "csv":
            lf = pl.scan_csv(path, infer_schema=False)
        elif kind == "ndjson":
            lf = pl.scan_ndjson(path, infer_schema_length=100)
        else:
            lf = pl.scan_parquet(path)
        present = [c for c in lf.collect_schema().names() if c in columns]
        if not present:
            continue
        part = lf.select(present).head(left).collect()
        frames.append(part)
        left -= part.height
        if left <= 0:
            break
    if not frames:
        return None
    return pl.concat(frames, how="diagonal_relaxed")


def job_advice(root: Path, job: Job) -> list[Problem]:
    """Warnings for the SQL steps of one job that group or split by a nearly unique input column."""
    wanted = [(i, g) for i, step in enumerate(job.spec.steps) if isinstance(step, SqlStep)
              for g in groupings(step.sql)]
    if not wanted:
        return []
    names = {g.column for _, g in wanted}
    out: list[Problem] = []
    for input_name, source in job.spec.inputs.items():
        if not isinstance(source, FileInput):
            continue
        paths = latest_files(root, source.files)
        data = sample(paths, source.format, names) if paths else None
        if data is None or data.height < MIN_ROWS:
            continue
        for index, g in wanted:
            if g.column not in data.columns or (g.table is not None and g.table != input_name
                                                 and g.table not in _aliases(job, index, input_name)):
                continue
            distinct = data[g.column].n_unique()
            if distinct / data.height > NEARLY_UNIQUE:
                out.append(job.problem(("steps", index, "sql"), (
                    f"step {index + 1} {g.clause} by {g.column}, which has {distinct:,} distinct values in "
                    f"{data.height:,} sampled rows of input {input_name} (groups of "
                    f"{data.height / distinct:.1f} rows on average); group or split by a low-cardinality "
                    "column (a date, a category, a method), and truncate timestamps first "
                    "(date_trunc('hour', ...))"), severity="warning"))
    return out


def _aliases(job: Job, index: int, input_name: str) -> set[str]:
    """Names the step gives the input (`FROM rides AS r`, `FROM rides r`)."""
    step = job.spec.steps[index]
    assert isinstance(step, SqlStep)
    found = re.findall(rf"\b{re.escape(input_name)}\s+(?:AS\s+)?([A-Za-z_]\w*)", strip_sql(step.sql), re.I)
    return {a for a in found if not _END.fullmatch(a) and a.upper() not in ("ON", "JOIN", "USING", "INNER",
                                                                              "LEFT", "RIGHT", "FULL", "CROSS")}


def batch_advice(root: Path, jobs: dict[str, Job]) -> list[Problem]:
    """Batch-size warnings for every job; advice never fails `weir check`, so any error means none."""
    out: list[Problem] = []
    for _, job in sorted(jobs.items()):
        try:
            out.extend(job_advice(root, job))
        except Exception:  # noqa: BLE001 - unreadable samples or odd SQL: no advice, never a failure
            continue
    return out
