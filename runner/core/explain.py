"""What changed between a window's recorded run and now: pure diffs for `weir why`.

Every function takes the recorded text (from the ledger's stored texts) and
the current one, and returns plain data: field-level spec changes, a unified
diff of step code, input files added, removed or changed, producer windows
whose output digests changed.
"""

from __future__ import annotations

import difflib
import json
from typing import Any


def _flatten(value: Any, prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    if isinstance(value, dict):
        for k, v in value.items():
            out.update(_flatten(v, f"{prefix}.{k}" if prefix else str(k)))
    elif isinstance(value, list):
        for i, v in enumerate(value):
            out.update(_flatten(v, f"{prefix}.{i}" if prefix else str(i)))
        if not value:
            out[prefix] = []
    else:
        out[prefix] = value
    return out


def spec_changes(recorded: str | None, current: str) -> list[dict[str, Any]]:
    """Field-level differences of the normalized spec: [{field, was, now}] (missing side is None)."""
    if recorded is None:
        return [{"field": "(whole spec)", "was": "not recorded", "now": "current"}]
    was = _flatten(json.loads(recorded))
    now = _flatten(json.loads(current))
    out = []
    for key in sorted(set(was) | set(now)):
        if was.get(key, _MISSING) != now.get(key, _MISSING):
            out.append({"field": key, "was": was.get(key), "now": now.get(key)})
    return out


_MISSING = object()


def code_diff(recorded: str | None, current: str) -> str:
    """Unified diff of the steps' code text (SQL and python module sources)."""
    if recorded is None:
        return "(the recorded code text is not in the ledger)"
    return "".join(difflib.unified_diff(
        recorded.splitlines(keepends=True), current.splitlines(keepends=True),
        fromfile="recorded run", tofile="now", n=2))


def input_changes(recorded: str | None, current: str) -> list[dict[str, Any]]:
    """Input files added, removed or changed: [{change, input, path, was, now}]."""
    was = {(e["input"], e["path"]): e for e in json.loads(recorded)} if recorded else {}
    now = {(e["input"], e["path"]): e for e in json.loads(current)}
    out = []
    for key in sorted(set(was) | set(now)):
        a, b = was.get(key), now.get(key)
        if a == b:
            continue
        change = "added" if a is None else "removed" if b is None else "changed"
        out.append({"change": change, "input": key[0], "path": key[1], "was": _describe(a), "now": _describe(b)})
    return out


def _describe(entry: dict[str, Any] | None) -> str | None:
    if entry is None:
        return None
    if "sha256" in entry:
        return f"sha256 {entry['sha256'][:12]}"
    if "digest" in entry:
        return f"{entry.get('rows')} rows, digest {entry['digest'][:12]}"
    from datetime import UTC, datetime

    from runner.model.timeutil import format_utc

    when = format_utc(datetime.fromtimestamp(entry["mtime_ns"] / 1e9, UTC))
    return f"{entry['size']} bytes, modified {when}"


def upstream_changes(recorded: str | None, current: str) -> list[dict[str, Any]]:
    """Producer windows whose output digest differs: [{input, job, window, was, now}]."""
    was = {(e["input"], e["job"], e["window"]): e["digest"] for e in json.loads(recorded)} if recorded else {}
    now = {(e["input"], e["job"], e["window"]): e["digest"] for e in json.loads(current)}
    out = []
    for key in sorted(set(was) | set(now)):
        if was.get(key) != now.get(key):
            out.append({"input": key[0], "job": key[1], "window": key[2], "was": was.get(key), "now": now.get(key)})
    return out
