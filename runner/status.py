"""The shell around planning: read the ledger and the file system once, then assess.

`Survey` gathers what the pure planner needs (ledger snapshot, current spec and
code hashes, an input probe backed by one file listing per input) and offers
the views the commands show: plan, stale ranges, impact.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from runner import fingerprint as fp
from runner.execute import spec_and_code
from runner.fileindex import FileIndex
from runner.ledger import Ledger
from runner.planner import Probe, Snapshot, assess
from runner.spec import DatabaseInput, FileInput
from runner.windows import Window
from runner.workspace import Workspace


def snapshot(ledger: Ledger, jobs: list[str]) -> Snapshot:
    """One query per job for its window states, one for the live claims."""
    states = {job: ledger.states(job) for job in jobs}
    claims = set(ledger.claimed().keys())
    return Snapshot(states=states, claims=claims)


@dataclass
class InputProber:
    """Probes windows' inputs from one listing per file input (built on first use)."""

    ws: Workspace
    indexes: dict[tuple[str, str], FileIndex] = field(default_factory=dict)

    def __call__(self, job: str, window: Window) -> Probe:
        from runner.sources import find_files

        spec = self.ws.jobs[job].spec
        entries: list[dict[str, Any]] = []
        newest = None
        waiting = None
        tables = False
        for name, source in spec.inputs.items():
            if isinstance(source, DatabaseInput):
                tables = True  # its rows are read by a run only: the input hash is unknown here
                continue
            if not isinstance(source, FileInput):
                continue
            key = (job, name)
            if key not in self.indexes:
                self.indexes[key] = FileIndex.build(self.ws.root, source.files)
            found = find_files(self.ws.root, name, source, window, self.indexes[key])
            entries.extend(found.manifest)
            if found.newest_mtime_ns is not None:
                newest = max(newest or 0, found.newest_mtime_ns)
            if not found.paths and source.required and waiting is None:
                waiting = f"input {name}: no files match {', '.join(found.patterns[:2])}"
        return Probe(None if tables else fp.input_part(entries).hash, newest, waiting)


def closure(ws: Workspace, jobs: list[str]) -> list[str]:
    """`jobs` (all when empty) plus their producers, transitively, in dependency order."""
    return ws.upstream(ws.select(jobs))


def survey(ws: Workspace, ledger: Ledger, at: datetime, jobs: list[str] | None = None,
           recheck_all: bool = False) -> dict[str, Any]:
    """Assessed frames of `jobs` (all when empty), reading the ledger and inputs once."""
    names = closure(ws, jobs or [])
    snap = snapshot(ledger, names)
    parts = {}
    for name in names:
        spec_p, code_p = spec_and_code(ws, name)
        parts[name] = (spec_p.hash, code_p.hash)
    return assess(ws, at, snap, parts, InputProber(ws), jobs or None, recheck_all)
