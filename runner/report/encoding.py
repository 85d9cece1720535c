"""Compact encodings for the per-window columns the page carries (decoded by assets/report.js).

A year of hourly windows for 20 jobs is 175,200 windows; written as plain
JSON numbers their figures would weigh several MB. They travel instead as:

- run lengths (`rle`): [value, count] pairs, for window steps and UTC offsets,
  which change a few times a year;
- Base64 VLQ (`vlq`): signed integers, 5 bits a digit, for durations, row
  counts and finish times (each minus the previous one, `deltas`);
- one character per window for its state (`STATE_CODE`).

`json_for_script` writes the JSON block so that nothing in it can end the
<script> element it sits in.
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import polars as pl

B64 = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/"


def vlq(values: pl.Series) -> str:
    """Signed integers as one Base64 VLQ string (5 bits a digit, lowest first, bit 6 = more digits follow;
    the sign in the lowest bit of the first digit), nulls as "B" (a negative zero, never made otherwise)."""
    import polars as pl

    cache: dict[int | None, str] = {None: "B"}
    out = []
    for v in values.cast(pl.Int64).to_list():
        text = cache.get(v)
        if text is None:
            text = cache[v] = _vlq_one(v)
        out.append(text)
    return "".join(out)


def _vlq_one(value: int) -> str:
    z = (-value << 1) | 1 if value < 0 else value << 1
    chars = []
    while True:
        digit, z = z & 31, z >> 5
        chars.append(B64[digit | 32 if z else digit])
        if not z:
            return "".join(chars)


def rle(values: list[Any]) -> list[list[Any]]:
    """Run lengths: consecutive equal values as [value, count] pairs."""
    out: list[list[Any]] = []
    for v in values:
        if out and out[-1][0] == v:
            out[-1][1] += 1
        else:
            out.append([v, 1])
    return out


def deltas(values: list[int | None]) -> list[int | None]:
    """Each non-null value minus the previous non-null one (the first is kept as is)."""
    out: list[int | None] = []
    prev = 0
    for v in values:
        if v is None:
            out.append(None)
        else:
            out.append(v - prev)
            prev = v
    return out


def json_for_script(data: Any) -> str:
    """JSON that is safe inside a <script> element (no `<`, `>`, `&` or line separators left raw)."""
    text = json.dumps(data, ensure_ascii=False, separators=(",", ":"), allow_nan=False)
    for raw, esc in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"), ("\u2028", "\\u2028"),
                     ("\u2029", "\\u2029")):
        text = text.replace(raw, esc)
    return text
