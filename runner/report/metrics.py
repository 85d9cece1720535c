"""Window counts, watermarks and run times in the Prometheus text exposition format.

`weir report --metrics FILE` writes this for a node exporter's textfile
collector (which reads `*.prom` files from its folder), so that monitoring can
alert on a stuck job: failed, late or overdue windows, windows due but not
done, a watermark that stops moving, or a last success that is too long ago.
Every sample is a gauge labelled with the job; the file is replaced
atomically, so the collector never reads half of it.

Metrics (all gauges):
- `weir_windows{job,state}`: due windows per state (done, stale, failed,
  running, waiting, ready), every state present, zero included.
- `weir_windows_late{job}`: due windows whose input arrived late.
- `weir_windows_to_run{job}`: windows a pulse would run now (ready, stale and
  current, failed with retries left).
- `weir_windows_overdue{job}`: due windows past the job's deadline and not
  done (only for jobs with a deadline).
- `weir_watermark_timestamp_seconds{job}`: how far the job's windows reach
  without a gap (every window before it holds an output); absent while the
  first window holds none.
- `weir_windows_not_done_behind_watermark{job}`: windows before the watermark
  that are not done (stale, or failed keeping an earlier output).
- `weir_rows_dropped{job}`: rows outside their window dropped by the windows'
  last runs, summed.
- `weir_last_success_timestamp_seconds{job}`: when its newest successful run
  finished (absent for a job that never succeeded).
- `weir_last_run_duration_seconds{job}`, `weir_last_run_timestamp_seconds{job}`,
  `weir_last_run_failed{job}`: its newest finished run.
- `weir_job_unplanned{job}`: 1 for a job that could not be planned.
- `weir_next_change_timestamp_seconds`: when the clock alone next changes the
  plan (absent when no window is left to come due).
- `weir_metrics_timestamp_seconds`: the clock these figures are for.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import TYPE_CHECKING

from runner.core.states import RunStatus, State

if TYPE_CHECKING:
    from runner.core.workspace import Workspace
    from runner.io.ledger.store import Ledger
    from runner.report.data import JobView, ReportData


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


class Family:
    """One metric family: its help text and samples, rendered as gauge lines."""

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


def _light_views(ws: Workspace, ledger: Ledger, at: datetime) -> ReportData:
    """What the metrics need without drawing anything: counts, watermark, overdue and dropped rows."""
    import sqlalchemy as sa

    from runner.core.planner import next_change
    from runner.engine.survey import survey
    from runner.io.ledger.schema import runs, windows
    from runner.report.data import ReportData, axis_zone, job_view, reach, with_shown_states

    assessed = survey(ws, ledger, at, None, recheck_all=True, extras=True)
    dropped: dict[str, int] = {}
    if ledger.engine is not None:
        q = (sa.select(windows.c.job, sa.func.sum(runs.c.rows_dropped))
             .select_from(windows.join(runs, runs.c.id == windows.c.run_id)).group_by(windows.c.job))
        with ledger.engine.connect() as conn:
            dropped = {job: int(n or 0) for job, n in conn.execute(q)}
    views = []
    for i, name in enumerate(ws.order):
        view = job_view(ws, i, name)
        frame = assessed.get(name)
        if frame is not None:
            frame = with_shown_states(frame, at, view.deadline)
            for state, n in frame.group_by("state").len().iter_rows():
                view.counts[state] = n
            view.total = frame.height
            view.late = int(frame["late"].sum()) if frame.height else 0
            view.overdue = int(frame["overdue"].sum()) if frame.height else 0
            view.watermark_us, k = reach(frame)
            view.behind = {"any": int((frame.head(k)["state"] != State.DONE).sum())} if k else {}
            view.dropped_rows = dropped.get(name, 0)
        views.append(view)
    zone, note = axis_zone(ws)
    return ReportData(title=ws.root.name, at=at, zone=zone, zone_note=note, axis=(0, 1), jobs=views,
                      next_change=next_change(ws, assessed, at), strings=[], assessed=assessed)


def metrics_text(ws: Workspace, ledger: Ledger, at: datetime, data: ReportData | None = None) -> str:
    """The workspace's window counts, watermarks and run times at `at`, in the Prometheus text format
    (version 0.0.4). `data` reuses what the page collected for the same clock."""
    from runner.core.planner import job_plans
    from runner.report.data import ORDER

    if data is None:
        data = _light_views(ws, ledger, at)
    assessed = data.assessed
    plans = {p.job: p for p in job_plans(ws, assessed, cap=False)}
    newest = ledger.newest_runs()
    windows = Family("weir_windows", "Due windows of a job by state at the report's clock.")
    late = Family("weir_windows_late", "Due windows of a job whose newest input arrived after its late_after allowance.")
    to_run = Family("weir_windows_to_run", "Windows of a job that a pulse would run now (ready, stale, failed with "
                                           "retries left).")
    overdue = Family("weir_windows_overdue", "Due windows of a job past its deadline and not done (jobs with a "
                                             "deadline only).")
    watermark = Family("weir_watermark_timestamp_seconds",
                       "Unix time up to which the job's windows hold an output without a gap (its watermark).")
    behind = Family("weir_windows_not_done_behind_watermark",
                    "Windows before the job's watermark that are not done (stale, or failed keeping an earlier output).")
    dropped = Family("weir_rows_dropped", "Rows outside their window dropped by the last runs of the job's windows.")
    success = Family("weir_last_success_timestamp_seconds",
                     "Unix time at which the job's newest successful run finished.")
    duration = Family("weir_last_run_duration_seconds", "Duration of the job's newest finished run, in seconds.")
    last_at = Family("weir_last_run_timestamp_seconds", "Unix time at which the job's newest finished run finished.")
    last_failed = Family("weir_last_run_failed", "1 when the job's newest finished run failed, else 0.")
    unplanned = Family("weir_job_unplanned", "1 for a job that could not be planned (its error is in weir plan).")
    for v in data.jobs:
        job = v.name
        if v.unplanned or job not in assessed:
            unplanned.add(1, job=job)
            continue
        view: JobView = v
        for state in ORDER:
            windows.add(view.counts.get(state, 0), job=job, state=state)
        late.add(view.late, job=job)
        plan = plans.get(job)
        to_run.add(len(plan.due) if plan is not None else 0, job=job)
        if view.deadline is not None:
            overdue.add(view.overdue, job=job)
        watermark.add(view.watermark_us / 1e6 if view.watermark_us is not None else None, job=job)
        behind.add(sum(view.behind.values()), job=job)
        dropped.add(view.dropped_rows, job=job)
        info = newest.get(job, {})
        success.add(_epoch(info.get("success")), job=job)
        last = info.get("last")
        if last is not None:
            duration.add(last["seconds"], job=job)
            last_at.add(_epoch(last["finished_at"]), job=job)
            last_failed.add(1 if last["status"] == RunStatus.FAILED else 0, job=job)
    change = Family("weir_next_change_timestamp_seconds",
                    "Unix time at which the clock alone next changes the plan (a window comes due or a retry is allowed).")
    change.add(data.next_change.timestamp() if data.next_change is not None else None)
    stamp = Family("weir_metrics_timestamp_seconds", "The clock these figures are for, as Unix time.")
    stamp.add(at.timestamp())
    families = [windows, late, to_run, overdue, watermark, behind, dropped, success, duration, last_at, last_failed,
                unplanned, change, stamp]
    return "".join(f.render() for f in families)
