"""Consecutive windows grouped into ranges: the one grouping the planner, the report and the CLI use.

A range is a run of windows, in time order, that touch (each starts where the
previous one ended) and agree on what is said about them (a state, a reason).
`range_numbers` numbers such runs in a polars frame of windows; `runs` groups
a list already in order by what is said about each item.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Iterable
from typing import TYPE_CHECKING, TypeVar

if TYPE_CHECKING:
    import polars as pl

T = TypeVar("T")


def range_numbers(*keys: str) -> pl.Expr:
    """A number per window (rows sorted by `start_us`) that grows where a new range starts: where a
    window does not start at the previous one's `end_us`, or any column of `keys` changes."""
    import polars as pl

    breaks = pl.col("start_us") != pl.col("end_us").shift(1)
    for key in keys:
        breaks = breaks | (pl.col(key) != pl.col(key).shift(1))
    return breaks.fill_null(True).cast(pl.Int64).cum_sum()


def runs(items: Iterable[T], key: Callable[[T], Hashable]) -> list[tuple[T, T, int]]:
    """Consecutive items with the same `key`, as (first, last, count), in order."""
    out: list[tuple[T, T, int]] = []
    for item in items:
        if out and key(out[-1][1]) == key(item):
            first, _, count = out[-1]
            out[-1] = (first, item, count + 1)
        else:
            out.append((item, item, 1))
    return out
