"""What a backfill is about to do, asked of the ledger before anything runs."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from runner.core.planner import Task
    from runner.io.ledger.store import Ledger


def existing_outputs(ledger: Ledger, tasks: list[Task]) -> int:
    """How many of the tasks' windows already have an output that a forced run would replace."""
    by_job: dict[str, list[str]] = {}
    for t in tasks:
        by_job.setdefault(t.job, []).append(t.window.key)
    count = 0
    for job, keys in by_job.items():
        rows = ledger.state_rows(job, keys)
        count += sum(1 for r in rows.values() if r.get("output"))
    return count
