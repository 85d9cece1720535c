"""The words weir uses for states, as enumerations (each a `str`: values, JSON and ledger rows unchanged).

- `State`: what a window is now (the planner's assessment, and the ledger's
  `weir_windows.state`, which holds done and failed only).
- `RunStatus`: what became of one recorded attempt (`weir_runs.status`).
- `Status`: what one command did with one window (an `Outcome` of run,
  backfill or tick).
- `Verdict`: what `weir verify` found wrong with an output (`weir_windows.output_state`).

The morning page shows some of them under other words (`runner.report.data.STATE_NAMES`).
"""

from __future__ import annotations

from enum import StrEnum


class State(StrEnum):
    """A window's state."""

    DONE = "done"  # ran with the fingerprint it would have now
    STALE = "stale"  # ran, but something it depends on changed since
    FAILED = "failed"  # its last attempt failed
    RUNNING = "running"  # another process holds its claim
    WAITING = "waiting"  # inputs or producer windows are not there yet
    MISSING = "missing"  # inputs present, never ran


STATES = tuple(State)  # in the order plans count them


class RunStatus(StrEnum):
    """What became of one recorded attempt at a window."""

    RUNNING = "running"  # started, not finished (or its process ended without a word)
    DONE = "done"
    FAILED = "failed"
    ABANDONED = "abandoned"  # its process ended before it finished, or it lost its claim


class Status(StrEnum):
    """What one command did with one window."""

    DONE = "done"
    FAILED = "failed"
    SKIPPED = "skipped"  # already current: nothing to do
    WAITING = "waiting"  # inputs or producers missing, or a producer failed in this run
    CLAIMED = "claimed"  # another process holds the window's claim
    NOT_DUE = "not due"
    NOT_STARTED = "not started"  # stopped before it started


class Verdict(StrEnum):
    """What `weir verify` found wrong with a done window's output."""

    MISSING = "missing"  # the file or the window's rows are gone
    CHANGED = "changed"  # changed outside weir
    UNREADABLE = "unreadable"  # damaged, or a database that is not one
