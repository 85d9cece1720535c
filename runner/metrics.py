"""Window counts and run times in the Prometheus text exposition format.

`weir report --metrics FILE` writes this for a node exporter's textfile
collector (which reads `*.prom` files from its folder), so that monitoring can
alert on a stuck job: failed or late windows, windows due but not done, or a
last success that is too long ago. Every sample is a gauge labelled with the
job; the file is replaced atomically, so the collector never reads half of it.

Metrics (all gauges):
- `weir_windows{job,state}`: due windows per state (done, stale, failed,
  running, waiting, missing), every state present, zero included.
- `weir_windows_late{job}`: due windows whose input arrived late.
- `weir_windows_to_run{job}`: windows a tick would run now (missing, stale
  and current, failed with retries left).
- `weir_last_success_timestamp_seconds{job}`: when its newest successful run
  finished (absent for a job that never succeeded).
- `weir_last_run_duration_seconds{job}`, `weir_last_run_timestamp_seconds{job}`,
  `weir_last_run_failed{job}`: its newest finished run.
- `weir_next_change_timestamp_seconds`: when the clock alone next changes the
  plan (absent when no window is left to come due).
- `weir_metrics_timestamp_seconds`: the clock these figures are for.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from runner.ledger import Ledger
    from runner.workspace import Workspace

STATES = ("done", "stale", "failed", "running", "waiting", "missing")


def escape_label(value: str) -> str:
    """A label value as the text format wants it: backslash, double quote and newline escaped."""
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def _escape_help(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n")


def _number(value: float | int) -> str:
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    if math.isnan(value):
        return "NaN"
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    return repr(float(value))


def _epoch(text: str | None) -> float | None:
    """Seconds since the Unix epoch of a ledger run time (`...%fZ`)."""
    if not text:
        return None
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC).timestamp()


class _Family:
    def __init__(self, name: str, help_text: str):
        self.name, self.help = name, help_text
        self.samples: list[tuple[dict[str, str], float | int]] = []

    def add(self, value: float | int | None, **labels: str) -> None:
        if value is not None:
            self.samples.append((labels, value))

    def render(self) -> str:
        lines = [f"# HELP {self.name} {_escape_help(self.help)}", f"# TYPE {self.name} gauge"]
        for labels, value in self.samples:
            inner = ",".join(f'{k}="{escape_label(v)}"' for k, v in labels.items())
            lines.append(f"{self.name}{{{inner}}} {_number(value)}" if inner else f"{self.name} {_number(value)}")
        return "\n".join(lines) + "\n"


def metrics_text(ws: Workspace, ledger: Ledger, at: datetime, assessed: dict[str, Any] | None = None) -> str:
    """The workspace's window counts and run times at `at`, in the Prometheus text format (version 0.0.4).

    `assessed` reuses a survey already made for the same clock (`runner.status.survey`).
    """
    from runner.planner import job_plans, next_change
    from runner.status import survey

    if assessed is None:
        assessed = survey(ws, ledger, at, None, extras=True)
    plans = {p.job: p for p in job_plans(ws, assessed, cap=False)}
    newest = ledger.newest_runs()
    windows = _Family("weir_windows", "Due windows of a job by state at the report's clock.")
    late = _Family("weir_windows_late", "Due windows of a job whose newest input arrived after its late_after allowance.")
    to_run = _Family("weir_windows_to_run", "Windows of a job that a tick would run now (missing, stale, failed with retries left).")
    success = _Family("weir_last_success_timestamp_seconds",
                      "Unix time at which the job's newest successful run finished.")
    duration = _Family("weir_last_run_duration_seconds", "Duration of the job's newest finished run, in seconds.")
    last_at = _Family("weir_last_run_timestamp_seconds", "Unix time at which the job's newest finished run finished.")
    last_failed = _Family("weir_last_run_failed", "1 when the job's newest finished run failed, else 0.")
    for job, frame in assessed.items():
        counts = dict.fromkeys(STATES, 0)
        for state, n in frame.group_by("state").len().iter_rows():
            counts[state] = n
        for state in STATES:
            windows.add(counts[state], job=job, state=state)
        late.add(int(frame["late"].sum()) if frame.height else 0, job=job)
        plan = plans.get(job)
        to_run.add(len(plan.due) if plan is not None else 0, job=job)
        info = newest.get(job, {})
        success.add(_epoch(info.get("success")), job=job)
        last = info.get("last")
        if last is not None:
            duration.add(last["seconds"], job=job)
            last_at.add(_epoch(last["finished_at"]), job=job)
            last_failed.add(1 if last["status"] == "failed" else 0, job=job)
    unplanned = _Family("weir_job_unplanned", "1 for a job that could not be planned (its error is in weir plan).")
    for job in ws.order:
        if job in getattr(assessed, "unplanned", {}):
            unplanned.add(1, job=job)
    nxt = next_change(ws, assessed, at)
    change = _Family("weir_next_change_timestamp_seconds",
                     "Unix time at which the clock alone next changes the plan (a window comes due or a retry is allowed).")
    change.add(nxt.timestamp() if nxt is not None else None)
    stamp = _Family("weir_metrics_timestamp_seconds", "The clock these figures are for, as Unix time.")
    stamp.add(at.timestamp())
    families = [windows, late, to_run, success, duration, last_at, last_failed, unplanned, change, stamp]
    return "".join(f.render() for f in families)
