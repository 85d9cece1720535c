"""The tick gate: lets a `weir tick` with nothing to do finish without planning.

cron starts `weir tick` every minute; most minutes nothing is due. After a
tick that found nothing to run, the gate file `state/tick-gate.json` records
the instant at which the plan can next change by the clock alone (the next
window's end plus settle, the next retry) and a digest of everything else the
plan depends on: the job files, python step modules, the listing (path, size,
mtime) of every file input's candidate files, the SQLite ledger file and this
weir's version. A later tick before that instant whose digest still matches
has nothing to do either, and stops there without loading the job files, the
ledger or the data libraries. Any difference at all means a full tick. Only a
SQLite ledger can be watched this way; other ledgers always take the full path.

This module uses the standard library only, so that the fast path stays fast.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from runner.core.paths import LEDGER, TICK_GATE
from runner.io.files import stat_files, wildcard, write_atomic

GATE = Path(TICK_GATE)


def _stat(path: str) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


def sqlite_file(root: Path, ledger_url: str | None) -> str | None:
    """The ledger's database file when it is SQLite (default: state/ledger.sqlite)."""
    if ledger_url is None:
        return str(root / LEDGER)
    prefix = "sqlite:///"
    if ledger_url.startswith(prefix) and ":memory:" not in ledger_url:
        return ledger_url[len(prefix):]
    return None


def observe(root: Path, templates: list[str], modules: list[str], ledger_file: str) -> str:
    """A digest of everything besides the clock that a plan depends on."""
    return _with_ledger(observe_files(root, templates, modules), ledger_file)


def ledger_stat(root: Path, ledger_url: str | None) -> str | None:
    """The SQLite ledger's files as stat sees them (None for other ledgers)."""
    ledger_file = sqlite_file(root, ledger_url)
    if ledger_file is None:
        return None
    return " ".join(str(_stat(ledger_file + suffix)) for suffix in ("", "-wal"))


def _with_ledger(files: str, ledger_file: str) -> str:
    h = hashlib.sha256(files.encode())
    for suffix in ("", "-wal"):
        h.update(f"ledger {suffix} {_stat(ledger_file + suffix)}\n".encode())
    return h.hexdigest()


def observe_files(root: Path, templates: list[str], modules: list[str]) -> str:
    """A digest of the job files, python step modules and every file input's candidate files."""
    from runner import __version__

    h = hashlib.sha256(__version__.encode())
    folder = root / "jobs"
    names = sorted(os.listdir(folder)) if folder.is_dir() else []
    for name in names:
        h.update(f"job {name} {_stat(str(folder / name))}\n".encode())
    for module in modules:
        h.update(f"module {module} {_stat(module)}\n".encode())
    for template in templates:
        for path, size, mtime_ns in sorted(stat_files(wildcard(root, template))):
            h.update(f"input {path} {(size, mtime_ns)}\n".encode())
    return h.hexdigest()


@dataclass(frozen=True)
class Idle:
    """The gate holds: nothing can be due before `until` (None: no change ahead by the clock alone)."""

    until: datetime | None


def fresh(root: Path, at: datetime, ledger_url: str | None) -> Idle | None:
    """`Idle` when the gate says nothing is due at `at`; None when a full tick is needed."""
    path = root / GATE
    try:
        record = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    ledger_file = sqlite_file(root, ledger_url)
    if ledger_file is None or record.get("ledger") != ledger_url or record.get("version") != 1:
        return None
    wake = record.get("wake_at")
    wake_at = datetime.fromisoformat(wake) if wake else None
    if wake_at is not None and at >= wake_at:
        return None
    if observe(root, record.get("templates", []), record.get("modules", []), ledger_file) != record.get("observed"):
        return None
    return Idle(wake_at)


def write(root: Path, ledger_url: str | None, templates: list[str], modules: list[str],
          wake_at: datetime | None, seen: str | None = None) -> None:
    """Record that nothing is due until `wake_at` given what is observed now.

    `seen` is `observe_files` taken before the tick planned: when the files differ now
    (a file landed or a job changed while it planned), no gate is written.
    """
    ledger_file = sqlite_file(root, ledger_url)
    if ledger_file is None:
        return
    files = observe_files(root, templates, modules)
    if seen is not None and files != seen:
        clear(root)
        return
    record: dict[str, Any] = {
        "version": 1,
        "ledger": ledger_url,
        "wake_at": wake_at.astimezone(UTC).isoformat() if wake_at else None,
        "templates": templates,
        "modules": modules,
        "written_at": datetime.now(UTC).isoformat(),
    }
    record["observed"] = _with_ledger(files, ledger_file)
    with contextlib.suppress(OSError):
        write_atomic(root / GATE, json.dumps(record, indent=1))


def clear(root: Path) -> None:
    with contextlib.suppress(OSError):
        (root / GATE).unlink()
