"""Samples of the newest input files, for `weir check`'s batch-size advice (`runner.core.advice`).

Only `weir check` calls this: loading a workspace reads no data. At most
`SAMPLE_FILES` of the newest files of each file input are opened and at most
`SAMPLE_ROWS` rows of the grouped columns read, lazily. Advice never fails a
check: a sample that cannot be read gives none.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from runner.core.advice import grouped_columns, grouping_advice
from runner.errors import Problem
from runner.io.files import stat_files, wildcard
from runner.model.spec import FileInput, Job

if TYPE_CHECKING:
    import polars as pl

SAMPLE_ROWS = 10_000  # rows read from the newest files of an input
SAMPLE_FILES = 8  # at most this many files are opened


def latest_files(root: Path, template: str, limit: int = SAMPLE_FILES) -> list[str]:
    """The newest files an input template can match (every placeholder as `*`), newest first."""
    found = [(mtime_ns, path) for path, _, mtime_ns in stat_files(wildcard(root, template))]
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


def batch_advice(root: Path, jobs: dict[str, Job]) -> list[Problem]:
    """Batch-size warnings for every job; advice never fails `weir check`, so any error means none."""
    out: list[Problem] = []
    for _, job in sorted(jobs.items()):
        try:
            columns = grouped_columns(job)
            if not columns:
                continue
            samples = {}
            for name, source in job.spec.inputs.items():
                if isinstance(source, FileInput):
                    paths = latest_files(root, source.files)
                    samples[name] = sample(paths, source.format, columns) if paths else None
            out.extend(grouping_advice(job, samples))
        except Exception:  # noqa: BLE001 - unreadable samples or odd SQL: no advice, never a failure
            continue
    return out
