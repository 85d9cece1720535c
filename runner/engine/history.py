"""`weir history`: the runs of a job or of one window, newest first, as the ledger recorded them."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from runner.core.assessment import parse_run_time
from runner.core.states import RunStatus
from runner.model.timeutil import parse_utc

if TYPE_CHECKING:
    from runner.core.workspace import Workspace
    from runner.io.ledger.store import Ledger


def run_history(ws: Workspace, ledger: Ledger, job: str, key: str | None, limit: int | None) -> list[dict[str, Any]]:
    """Runs of `job` (of the window keyed `key`), newest first, as plain dicts.

    A run recorded as running whose window has no live claim is shown
    abandoned (the process running it has ended); `late` says whether its
    newest input arrived after the window's end plus the job's `late_after`.
    """
    rows = ledger.history(job, key, limit)
    live = ledger.claimed(job)
    for row in rows:
        if row["status"] == RunStatus.RUNNING and (job, row["window_key"]) not in live:
            row["status"] = RunStatus.ABANDONED  # no live claim: the process running it has ended
    late_after = ws.jobs[job].spec.late_after
    for row in rows:
        row["late"] = bool(late_after is not None and row.get("ingested_at") and row.get("window_end")
                           and parse_utc(row["window_end"]) + late_after < parse_run_time(row["ingested_at"]))
    return rows
