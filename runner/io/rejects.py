"""What the readers give back: the good rows, and the bad ones with where and why.

A reader returns `Rows`: `frame`, the rows it could read, and `rejects`, one
row per bad record with `source_file` (the label the caller gave, usually the
path relative to the workspace), `source_row` (the record's number in the
file, from 1), `reason`, and the record's own columns as text: the same
columns as the quarantine file CSV inputs write. A file that cannot be read
at all raises `UnreadableFile`, naming it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from runner.errors import WeirError

if TYPE_CHECKING:
    import polars as pl

WHERE = ("source_file", "source_row", "reason")


class UnreadableFile(WeirError):
    """A file that cannot be read at all (not the format, damaged, not valid against its schema)."""


@dataclass(frozen=True)
class Rows:
    """The good rows of a file and its bad records (see the module docstring)."""

    frame: pl.DataFrame
    rejects: pl.DataFrame


def rejects_frame(label: str, numbers: list[int], reasons: list[str], columns: pl.DataFrame) -> pl.DataFrame:
    """The rejects of one file: where and why, then `columns` (the bad records' values) as text."""
    import polars as pl

    texts = [(columns[c].bin.encode("hex") if columns.schema[c] == pl.Binary else columns[c].cast(pl.String))
             .alias(c) for c in columns.columns]
    where = pl.DataFrame({
        "source_file": pl.Series([label] * len(numbers), dtype=pl.String),
        "source_row": pl.Series(numbers, dtype=pl.Int64),
        "reason": pl.Series(reasons, dtype=pl.String),
    })
    return pl.concat([where, columns.select(texts)], how="horizontal") if texts else where
