"""`weir verify`: every done window's output read again and compared with what the ledger recorded.

A file output is compared by its SHA-256, a table output by the digest of the
window's rows. Missing, changed and unreadable outputs are reported and their
windows marked stale by output, so the next tick or backfill restores them.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any

from runner.core.states import State, Verdict
from runner.errors import WeirError

if TYPE_CHECKING:
    from runner.core.workspace import Workspace
    from runner.io.ledger.store import Ledger


@dataclass
class OutputProblem:
    """A done window whose output is not what the ledger recorded."""

    job: str
    window: str  # the window's id
    output: str  # the output as recorded (a path, or the table)
    problem: Verdict
    detail: str | None  # why it cannot be read, when that is the problem

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def verify_outputs(ws: Workspace, ledger: Ledger, jobs: list[str]) -> list[OutputProblem]:
    """Re-read every done window's output; report (and mark stale by output) missing, changed or
    unreadable ones (a file that cannot be read, a database that is not one)."""
    import polars as pl

    problems: list[OutputProblem] = []
    for job in ws.select(jobs):
        states = ledger.states(job).filter(pl.col("state") == State.DONE)
        bad: dict[Verdict, list[str]] = {Verdict.MISSING: [], Verdict.CHANGED: [], Verdict.UNREADABLE: []}
        fine: list[str] = []
        broken: str | None = None  # why the job's output database cannot be read, once found
        for row in states.iter_rows(named=True):
            if broken is None:
                verdict, detail = _verify_output(ws, job, row)
                if verdict == Verdict.UNREADABLE and ws.jobs[job].spec.output.path is None:
                    broken = detail
            else:
                verdict, detail = Verdict.UNREADABLE, broken
            if verdict:
                bad[verdict].append(row["window_key"])
                problems.append(OutputProblem(job, row["window_id"], row["output"], verdict, detail))
            elif row["output_state"]:
                fine.append(row["window_key"])
        for verdict, keys in bad.items():
            if keys:
                ledger.set_output_state(job, keys, verdict)
        if fine:
            ledger.set_output_state(job, fine, None)
    return problems


def _verify_output(ws: Workspace, job: str, row: dict[str, Any]) -> tuple[Verdict | None, str | None]:
    """One done window's output against the ledger: (None | missing | changed | unreadable, detail)."""
    import sqlalchemy as sa

    from runner.core.paths import database_url
    from runner.io.databases import table_rows
    from runner.io.files import file_sha256
    from runner.io.outputs import read_table_digest

    out = ws.jobs[job].spec.output
    if out.path is not None:
        path = ws.root / row["output"]
        if not path.exists():
            return Verdict.MISSING, None
        try:
            same = not row["output_checksum"] or file_sha256(path) == row["output_checksum"]
        except OSError as exc:
            return Verdict.UNREADABLE, exc.strerror or str(exc)
        return (None if same else Verdict.CHANGED), None
    assert out.database is not None and out.table is not None  # a table output
    url = database_url(ws.root, out.database)
    try:
        digest = read_table_digest(url, out.table, row["window_key"])
        if digest is None:
            return Verdict.MISSING, None
        if digest == row["output_digest"]:
            return None, None
        if table_rows(url, out.table, [row["window_key"]]).height == 0:
            return Verdict.MISSING, None  # the window's rows were deleted (a run that wrote none matches)
        return Verdict.CHANGED, None
    except sa.exc.OperationalError as exc:  # locked, cannot connect: the database is there, not reachable now
        raise WeirError(f"cannot read table {out.table} of job {job}: {_first_line(exc)}") from None
    except sa.exc.DatabaseError as exc:  # not a database, malformed: the output is damaged
        return Verdict.UNREADABLE, _first_line(exc)


def _first_line(exc: BaseException) -> str:
    return str(getattr(exc, "orig", None) or exc).splitlines()[0]
