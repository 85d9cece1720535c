"""Mutated job files never make `weir` crash: exit 0 or 2, never a traceback.

hypothesis starts from valid job files (the example workspace's and a few
more), mutates them structurally (delete, rename or duplicate keys, replace
values with random scalars, lists and mappings) and as text (truncate, insert
random characters, drop or repeat lines), and runs `weir check` in-process.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

ROOT = Path(__file__).resolve().parent.parent

EXTRA_SEEDS = [
    """\
description: Rentals per dock every weekday morning.
window: {cron: "15 6 * * 1-5", start: 2026-01-05, timezone: Australia/Sydney, settle: PT30M}
inputs:
  rentals:
    database: sqlite:///state/app.sqlite
    table: rentals
    time_column: rented_at
    schema: {dock: str, rented_at: "datetime(UTC)", fee: "decimal(8,2)"}
steps:
  - sql: SELECT dock, COUNT(*) AS rentals, SUM(fee) AS fees FROM rentals GROUP BY dock
    name: per_dock
  - python: bikes.reports:finish
output:
  database: sqlite:///state/warehouse.sqlite
  table: dock_mornings
  stamp: true
  checks:
    - key: [dock]
    - rows: {min: 1}
    - change: {column: fees, max_drop: 50%}
    - not_null: [dock]
""",
    """\
window:
  every: 1mo
  start: 2026-01-31T00:00
  end: 2027-01-01
  timezone: America/Santiago
inputs:
  daily: {job: rides_daily, lookback: 7d}
  before: {job: zone_monthly, lag: 1}
  zones: {files: "state/landing/zones.csv", required: false, fingerprint: content, key: [zone]}
steps:
  - sql: SELECT zone, SUM(rides) AS rides FROM daily GROUP BY zone
output:
  path: state/warehouse/zone_monthly/{start:%Y-%m}.csv
  checks: [{rule: "rides >= 0"}]
""",
]
SEEDS = [p.read_text() for p in sorted((ROOT / "jobs").glob("*.yaml"))] + EXTRA_SEEDS

NAMES = ["rides_hourly", "rides_daily", "dock_fleet", "zone_monthly"]

SCALARS = st.one_of(
    st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
    st.text(max_size=12),
    st.sampled_from(["1h", "15m", "1mo", "0m", "2026-01-01", "2026-02-30", "no", "on", "0 25 * * *",
                     "* * * * *", "{start}", "{end:%Y}", "{nope}", "{start:%Q}", "Europe/Lisbon", "Mars/Base",
                     "rides_hourly", "rides_daily", "dock_fleet", "P1M", "-1", "~", "", ".inf", "..", "/etc",
                     "SELECT * FROM read_csv('x')", "SELECT nope FROM rides", "str", "decimal(99,1)",
                     "pkg.mod:fn", "sqlite:///x.db", "content", "50%", "-5%"]),
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: st.one_of(st.lists(inner, max_size=3),
                            st.dictionaries(st.sampled_from(["job", "lag", "sql", "every", "x", "type", "min"]),
                                            inner, max_size=3)),
    max_leaves=6,
)
KEYS = st.one_of(st.sampled_from(["windw", "evry", "timezone", "schema", "columns", "job", "files", "sql",
                                  "checks", "lag", "lookback", "stamp", "name", "end", "1", "true", "null"]),
                 st.text(min_size=1, max_size=8))
NOISE = st.text(alphabet=st.one_of(st.sampled_from(list(":{}[]&*!|>'\"%@`#-,?\t\n ")),
                                  st.characters(codec="utf-8")),  # a file holds UTF-8: no lone surrogates
                min_size=1, max_size=6)


def paths(data: Any, prefix: tuple = ()) -> list[tuple]:
    """Every path to a mapping value or list item in `data`."""
    out = []
    if isinstance(data, dict):
        for k, v in data.items():
            out.append(prefix + (k,))
            out.extend(paths(v, prefix + (k,)))
    elif isinstance(data, list):
        for i, v in enumerate(data):
            out.append(prefix + (i,))
            out.extend(paths(v, prefix + (i,)))
    return out


def parent(data: Any, path: tuple) -> Any:
    for part in path[:-1]:
        data = data[part]
    return data


@st.composite
def mutated_job(draw) -> str:
    data = yaml.load(draw(st.sampled_from(SEEDS)), Loader=yaml.BaseLoader)  # every scalar a string
    for _ in range(draw(st.integers(0, 3))):
        where = paths(data)
        if not where:
            break
        path = draw(st.sampled_from(where))
        holder, last = parent(data, path), path[-1]
        action = draw(st.sampled_from(["delete", "rename", "replace", "replace"]))
        if action == "delete":
            del holder[last]
        elif action == "rename" and isinstance(holder, dict):
            holder[draw(KEYS)] = holder.pop(last)
        else:
            holder[last] = draw(VALUES)
    text = yaml.safe_dump(data, sort_keys=False, allow_unicode=True)
    for _ in range(draw(st.integers(0, 2))):
        lines = text.splitlines(keepends=True)
        action = draw(st.sampled_from(["truncate", "insert", "drop line", "repeat line"]))
        if action == "truncate":
            text = text[: draw(st.integers(0, len(text)))]
        elif action == "insert":
            at = draw(st.integers(0, len(text)))
            text = text[:at] + draw(NOISE) + text[at:]
        elif lines:
            i = draw(st.integers(0, len(lines) - 1))
            lines.insert(i, lines[i]) if action == "repeat line" else lines.pop(i)
            text = "".join(lines)
    return text


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow,
                                 HealthCheck.data_too_large])
@given(files=st.lists(st.tuples(st.sampled_from(NAMES), mutated_job()), min_size=1, max_size=3))
def test_mutated_job_files_give_exit_0_or_2_and_never_a_traceback(weir, tmp_path, files):
    root = tmp_path / "ws"
    shutil.rmtree(root, ignore_errors=True)
    (root / "jobs").mkdir(parents=True)
    for name, text in files:
        (root / "jobs" / f"{name}.yaml").write_text(text, encoding="utf-8")
    result = weir(root, "check", "--at", "2026-04-01T00:00Z")
    assert result.exit_code in (0, 2), result.output
    assert "Traceback" not in result.output
    assert "internal error" not in result.output, result.output
    if result.exit_code == 0:
        name = files[-1][0]
        for args in (("windows", name, "--from", "2026-03-28", "--to", "2026-03-30", "--json"),
                     ("graph", "--format", "mermaid")):
            later = weir(root, *args, "--at", "2026-04-01T00:00Z") if args[0] == "windows" else weir(root, *args)
            assert later.exit_code in (0, 2), later.output
            assert "internal error" not in later.output, later.output
