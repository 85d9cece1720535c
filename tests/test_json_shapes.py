"""The --json output of every command keeps its shape: keys, nesting and value kinds.

Scripts read this output, so a change of shape is a change users see. The
expected shapes in tests/data/json_shapes.json were recorded from the commands
before the package was reorganised (the house issue); a test here fails when a
key appears, disappears or changes kind. Regenerate the file only for a change
of shape that is meant, and say so in the commit: `python tests/test_json_shapes.py`.
"""

from __future__ import annotations

import json
import shutil
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from conftest_run import cli  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
EXPECTED = Path(__file__).resolve().parent / "data" / "json_shapes.json"
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
AT = "2026-12-01T12:00:00Z"

# Each command with --json, in the order it runs on one demo workspace (later ones change it).
COMMANDS: list[tuple[str, tuple[str, ...], int]] = [
    ("check", ("check", "--at", AT), 0),
    ("windows", ("windows", "rides_daily", "--from", "2026-03-28", "--to", "2026-03-31", "--at", AT), 0),
    ("plan", ("plan", "--at", AT), 0),
    ("stale (none)", ("stale", "--at", AT), 0),
    ("history", ("history", "rides_hourly", "--window", "2026-03-25T14:00", "--limit", "2"), 0),
    ("why (done, late)", ("why", "rides_hourly", "2026-03-25T14:00", "--at", AT), 0),
    ("advise", ("advise",), 0),
    ("edit", (), 0),  # the README's one-line change to rides_daily
    ("impact", ("impact", "--at", AT, "--workers", "1"), 0),
    ("stale", ("stale", "--at", AT), 0),
    ("why (stale)", ("why", "rides_daily", "2026-03-25", "--at", AT), 0),
    ("why (not due)", ("why", "rides_daily", "2026-04-04", "--at", "2026-04-04T12:00:00Z"), 0),
    ("backfill --dry-run", ("backfill", "rides_daily", "--from", "2026-03-25", "--to", "2026-03-27",
                            "--dry-run", "--at", AT), 0),
    ("backfill", ("backfill", "rides_daily", "--from", "2026-03-25", "--to", "2026-03-27", "--at", AT,
                  "--workers", "1"), 0),
    ("run", ("run", "rides_daily", "--window", "2026-03-25"), 0),
    ("run --force", ("run", "rides_daily", "--window", "2026-03-25", "--force"), 0),
    ("delete", (), 0),  # one output removed behind weir's back
    ("verify", ("verify", "rides_daily"), 1),
    ("tick", ("tick", "--at", AT, "--workers", "1"), 0),
    ("tick (again)", ("tick", "--at", AT, "--workers", "1"), 0),  # what read the re-run windows
    ("tick (nothing due)", ("tick", "--at", AT, "--workers", "1"), 0),
    ("tick (idle)", ("tick", "--at", AT, "--workers", "1"), 0),  # the idle gate answers
    ("report", ("report", "--at", AT), 0),
]


def shape(value: Any) -> Any:
    """The shape of a JSON value: keys and nesting kept, scalars replaced by their kind."""
    if isinstance(value, dict):
        return {key: shape(value[key]) for key in sorted(value)}
    if isinstance(value, list):
        kinds = {json.dumps(shape(v), sort_keys=True) for v in value}
        return ["list", *(json.loads(k) for k in sorted(kinds))]
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "bool"
    if isinstance(value, int | float):
        return "number"
    return type(value).__name__


def record(root: Path) -> dict[str, Any]:
    """Run COMMANDS on the demo workspace at `root`; the shape of each one's JSON."""
    from runner import api

    shutil.copytree(ROOT / "jobs", root / "jobs")
    assert api.demo(root, now=NOW, workers=1).backfill.failed == 0
    shapes: dict[str, Any] = {}
    for name, args, status in COMMANDS:
        if name == "edit":
            daily = root / "jobs" / "rides_daily.yaml"
            text = daily.read_text()
            assert "SUM(revenue) AS revenue" in text
            daily.write_text(text.replace("SUM(revenue) AS revenue", "ROUND(SUM(revenue), 0) AS revenue"))
            continue
        if name == "delete":
            (root / "state" / "warehouse" / "rides_daily" / "2026-03-30.parquet").unlink()
            continue
        out = cli(root, *args, "--json")
        assert out.exit_code == status, (name, out.stdout, out.stderr)
        shapes[name] = shape(json.loads(out.stdout))
    shapes["schema"] = sorted(json.loads(cli(root, "schema").stdout))  # top-level keys of the JSON Schema
    return shapes


@pytest.fixture(scope="module")
def recorded(tmp_path_factory) -> dict[str, Any]:
    return record(tmp_path_factory.mktemp("shapes"))


@pytest.mark.parametrize("command", [name for name, args, _ in COMMANDS if args] + ["schema"])
def test_json_output_keeps_its_recorded_shape(recorded, command):
    expected = json.loads(EXPECTED.read_text())
    assert recorded[command] == expected[command]


if __name__ == "__main__":
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        EXPECTED.write_text(json.dumps(record(Path(tmp)), indent=1, sort_keys=True) + "\n")
    print(f"wrote {EXPECTED}")
