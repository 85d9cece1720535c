"""Fingerprints: canonical hashes of everything a window's output depends on.

Pure functions. A window's fingerprint has four components, each hashed and
stored on its own so that a change can be attributed:

* `spec`: the normalized job spec. Comments, key order, `description` and the
  operational settings (retries, settle, recheck, catch-up, lateness, time allowed,
  the range `start`/`end`, output checks, an input's `allow_outside`) do not
  count, nor does step code.
* `code`: the SQL text of each step; for python steps the module file's bytes.
* `input`: for each input file its relative path, size and mtime_ns (or a hash
  of its bytes with `fingerprint: content`); for database inputs a digest of
  the rows read.
* `upstream`: the content digests of the producer windows' outputs. A producer
  re-run that yields the same data leaves its consumers current.

The total also covers the window's own bounds.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import polars as pl

    from runner.model.spec import JobSpec

COMPONENTS = ("spec", "code", "input", "upstream")
_DIGITS = 32  # hex digits kept: 128 bits

_OPERATIONAL = {"description", "retries", "retry_delay", "recheck", "max_catch_up", "late_after", "time_allowed"}
_WINDOW_OPERATIONAL = {"start", "end", "settle"}


def digest(data: bytes | str) -> str:
    if isinstance(data, str):
        data = data.encode()
    return hashlib.sha256(data).hexdigest()[:_DIGITS]


def canonical_json(value: Any) -> str:
    """JSON with sorted keys and no insignificant white space (stable hashing input)."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, default=str)


@dataclass(frozen=True)
class Part:
    """One component: its hash and the text it was computed from (kept in the ledger for diffs)."""

    hash: str
    text: str


def normalized_spec(spec: JobSpec) -> dict[str, Any]:
    """The job spec as it counts for the output: a plain, sorted structure."""
    data = spec.model_dump(mode="json", by_alias=True, exclude_none=True)
    for key in _OPERATIONAL:
        data.pop(key, None)
    for key in _WINDOW_OPERATIONAL:
        data["window"].pop(key, None)
    data["steps"] = [{k: v for k, v in step.items() if k not in ("sql", "python")} | {
        "kind": "sql" if "sql" in step else "python"} for step in data["steps"]]
    output = data.get("output", {})
    output.pop("checks", None)
    for source in data.get("inputs", {}).values():
        source.pop("allow_outside", None)  # a permission: the files read are the same
    return data


def spec_part(spec: JobSpec) -> Part:
    text = json.dumps(normalized_spec(spec), sort_keys=True, indent=2, ensure_ascii=False)
    return Part(digest(text), text)


def code_part(pieces: Sequence[tuple[str, str]]) -> Part:
    """`pieces` are (label, text): one per step, in order (SQL text or module source)."""
    text = "".join(f"-- step {label}\n{body}\n" for label, body in pieces)
    return Part(digest(text), text)


def input_part(entries: Iterable[dict[str, Any]]) -> Part:
    """Entries describe each input file or query: {input, path, size, mtime_ns} or {input, path, sha256}."""
    rows = sorted(entries, key=lambda e: (e.get("input", ""), e.get("path", "")))
    text = canonical_json(rows)
    return Part(digest(text), text)


def upstream_part(entries: Iterable[dict[str, Any]]) -> Part:
    """Entries are {input, job, window, digest}, one per producer window read."""
    rows = sorted(entries, key=lambda e: (e["input"], e["job"], e["window"]))
    text = canonical_json(rows)
    return Part(digest(text), text)


def total(window_key: str, window_end_key: str, parts: dict[str, Part]) -> str:
    """The window's fingerprint: its bounds and the four component hashes."""
    body = "|".join([window_key, window_end_key, *(parts[c].hash for c in COMPONENTS)])
    return digest(body)


def changed(recorded: dict[str, str | None], current: dict[str, str]) -> list[str]:
    """The components whose hash differs between a recorded run and now, in order."""
    return [c for c in COMPONENTS if recorded.get(f"fp_{c}") != current[c]]


def sort_columns(schema: Any, exclude: Sequence[str] = ()) -> list[str]:
    """The columns a canonical row order sorts by: every sortable column, in schema order."""
    return [c for c, t in schema.items() if c not in set(exclude) and _sortable(t)]


def frame_digest(frame: pl.DataFrame, exclude: Sequence[str] = ()) -> str:
    """Content digest of a frame: column names, types and rows in canonical order.

    Rows are sorted by every sortable column first, so the digest does not
    depend on row order; rows are serialized as CSV text, which is stable across
    library versions for the same values. Columns in `exclude` (run stamps) do
    not count.
    """
    cols = [c for c in frame.columns if c not in set(exclude)]
    data = frame.select(cols)
    keys = sort_columns(data.schema)
    if keys and data.height > 1:
        data = data.sort(keys, nulls_last=True, maintain_order=True)
    return batches_digest(data.schema, [data])


def batches_digest(schema: Any, batches: Iterable[pl.DataFrame]) -> str:
    """Digest of rows already in canonical order, given in batches (bounded memory)."""
    h = hashlib.sha256()
    h.update(canonical_json([[c, str(t)] for c, t in schema.items()]).encode())
    for batch in batches:
        if batch.height:
            h.update(batch.write_csv(include_header=False, null_value="\\N").encode())
    return h.hexdigest()[:_DIGITS]


def _sortable(dtype: Any) -> bool:
    import polars as pl

    return not isinstance(dtype, pl.List | pl.Struct | pl.Array | pl.Object)
