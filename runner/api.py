"""The public Python surface: one function per CLI command, returning plain data.

The CLI only parses arguments, calls these and renders the result, so every
command can be used from Python too. Functions take a workspace root (or a
loaded `Workspace`) and an explicit clock `at`; nothing here reads the time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from runner.errors import UsageError
from runner.spec import DatabaseInput, FileInput, JobInput
from runner.timeutil import BadValue, format_duration, format_instant, format_utc
from runner.workspace import Workspace, load_workspace


def workspace(root: Path | str = ".") -> Workspace:
    """Load and validate the workspace at `root` (raises SpecProblems)."""
    return load_workspace(root)


@dataclass
class JobSummary:
    name: str
    cadence: str
    inputs: list[str]
    output: str
    windows_due: int
    first_window: str | None
    description: str | None = None

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass
class CheckReport:
    jobs: list[JobSummary]
    warnings: list[str] = field(default_factory=list)
    order: list[str] = field(default_factory=list)


def describe_input(name: str, source: Any) -> str:
    if isinstance(source, FileInput):
        return f"{name}: files {source.files}"
    if isinstance(source, JobInput):
        shift = f", lag {source.lag}" if source.lag else ""
        if source.lookback:
            from runner.timeutil import short_duration

            shift = f", lookback {short_duration(source.lookback)}"
        return f"{name}: job {source.job}{shift}"
    if isinstance(source, DatabaseInput):
        what = f"table {source.table}" if source.table else "query"
        return f"{name}: database {what}"
    return name  # pragma: no cover


def check(root: Path | str, at: datetime) -> CheckReport:
    """Validate a workspace and summarize each job (raises SpecProblems on errors)."""
    ws = load_workspace(root)
    summaries = []
    for name in ws.order:
        job = ws.jobs[name]
        cad = ws.cadence(name)
        out = job.spec.output
        first = cad.first()
        summaries.append(JobSummary(
            name=name,
            cadence=cad.describe(),
            inputs=[describe_input(n, s) for n, s in job.spec.inputs.items()],
            output=out.path if out.path is not None else f"table {out.table}",
            windows_due=len(cad.due(at)),
            first_window=first.id if first else None,
            description=job.spec.description,
        ))
    return CheckReport(jobs=summaries, warnings=[w.render() for w in ws.warnings], order=list(ws.order))


def parse_bound(ws: Workspace, job: str, text: str | None, option: str) -> datetime | None:
    """A user-given bound; no offset means the job's local time."""
    if text is None:
        return None
    try:
        return ws.cadence(job).parse(text)
    except BadValue as exc:
        raise UsageError(f"{option}: {exc}") from None


def windows(ws: Workspace, job: str, lo: datetime | None, hi: datetime | None, at: datetime) -> list[dict[str, Any]]:
    """Windows of `job` whose start lies in `[lo, hi)` (defaults: job start; job end or `at`)."""
    cad = ws.cadence(job)
    if hi is None:
        hi = cad.end if cad.end is not None else at
    if lo is not None and hi <= lo:
        raise UsageError(f"--to ({format_instant(hi, cad.tz)}) must be after --from ({format_instant(lo, cad.tz)})")
    span = cad.span(lo, hi)
    out = []
    for w in span:
        out.append({
            "window": w.id,
            "start": w.id,
            "end": format_instant(w.end, cad.tz),
            "start_utc": format_utc(w.start),
            "end_utc": format_utc(w.end),
            "length": format_duration(w.length),
            "length_seconds": int(w.length.total_seconds()),
        })
    return out
