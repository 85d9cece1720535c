"""Declared column types (`str`, `int`, `decimal(12,2)`, `datetime(Europe/Lisbon)`...) as polars dtypes."""

from __future__ import annotations

import re
from functools import lru_cache
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import polars as pl

_DECIMAL = re.compile(r"^decimal\((\d+)\s*,\s*(\d+)\)$")
_DATETIME = re.compile(r"^datetime(?:\((.+)\))?$")


@lru_cache(maxsize=256)
def polars_dtype(declared: str) -> pl.DataType:
    """The polars dtype of a declared column type (validated by `runner.model.spec.Column`).

    `datetime` without a zone is timezone-naive microseconds; `datetime(Z)`
    is aware in zone Z (values with an offset are converted to it).
    """
    import polars as pl

    text = declared.strip()
    simple = {
        "str": pl.String(),
        "int": pl.Int64(),
        "float": pl.Float64(),
        "bool": pl.Boolean(),
        "date": pl.Date(),
    }
    if text in simple:
        return simple[text]
    m = _DECIMAL.match(text)
    if m:
        return pl.Decimal(int(m.group(1)), int(m.group(2)))
    m = _DATETIME.match(text)
    if m:
        return pl.Datetime("us", m.group(1).strip() if m.group(1) else None)
    raise ValueError(f"unknown column type {declared!r}")
