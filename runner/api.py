"""The public Python surface: one function per CLI command, returning plain data.

The CLI only parses arguments, calls these and renders the result, so every
command can be used from Python too. Functions take a workspace root (or a
loaded `Workspace`) and an explicit clock `at`; nothing here reads the time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from runner.core.workspace import Workspace
from runner.engine.loading import load_workspace
from runner.errors import UsageError, WeirError
from runner.model.spec import DatabaseInput, FileInput, JobInput
from runner.model.timeutil import BadValue, format_duration, format_instant, format_utc, parse_utc


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
            from runner.model.timeutil import short_duration

            shift = f", lookback {short_duration(source.lookback)}"
        return f"{name}: job {source.job}{shift}"
    if isinstance(source, DatabaseInput):
        what = f"table {source.table}" if source.table else "query"
        return f"{name}: database {what}"
    return name  # pragma: no cover


def check(root: Path | str, at: datetime) -> CheckReport:
    """Validate a workspace and summarize each job (raises SpecProblems on errors)."""
    from runner.engine.samples import batch_advice

    ws = load_workspace(root)
    warnings = [*ws.warnings, *batch_advice(ws.root, ws.jobs)]
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
    return CheckReport(jobs=summaries, warnings=[w.render() for w in warnings], order=list(ws.order))


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


# ---------------------------------------------------------------- running


def open_ledger(root: Path | str, url: str | None = None, create: bool = True):
    """The ledger of a workspace (default `state/ledger.sqlite` inside it)."""
    from runner.io.ledger.store import Ledger, default_url

    return Ledger(url or default_url(Path(root).resolve()), create=create)


def find_window(ws: Workspace, job: str, window_id: str):
    """The window of `job` named by `window_id` (any ISO 8601 form of its start)."""
    cad = ws.cadence(job)
    try:
        return cad.window(window_id)
    except BadValue as exc:
        raise UsageError(f"--window: {exc}") from None
    except ValueError as exc:
        raise UsageError(f"job {job}: {exc}") from None


def run(root: Path | str, job: str, window_id: str, ledger_url: str | None = None, force: bool = False,
        at: datetime | None = None):
    """Run one window of `job` (skipped when current unless `force`) in a worker process. Returns an Outcome."""
    from runner.core.planner import Task
    from runner.engine.pool import run_tasks, warm_up
    from runner.engine.window import Outcome, RunContext
    from runner.io.outputs import sweep_temporaries

    warm_up()
    ws = load_workspace(root, thorough=False)
    ws.job(job)
    window = find_window(ws, job, window_id)
    cad = ws.cadence(job)
    if at is not None and window.end + cad.settle > at:
        return Outcome(job, window.id, "not due",
                       f"not due until {format_instant(window.end + cad.settle, cad.tz)}")
    ledger = open_ledger(ws.root, ledger_url)
    sweep_temporaries(ws, at or window.end)
    return run_tasks([Task(job, window)], RunContext(ws=ws, ledger=ledger), 1, force=force)[0]


@dataclass
class BackfillResult:
    outcomes: list[Any]
    not_due: dict[str, int]
    replaced: int = 0

    def counts(self) -> dict[str, dict[str, int]]:
        out: dict[str, dict[str, int]] = {}
        for o in self.outcomes:
            out.setdefault(o.job, {}).setdefault(o.status, 0)
            out[o.job][o.status] += 1
        return out

    @property
    def failed(self) -> int:
        return sum(1 for o in self.outcomes if o.status == "failed")


def plan_backfill(ws: Workspace, jobs: list[str], lo: datetime | None, hi: datetime | None, at: datetime,
                  downstream: bool = False):
    """The backfill's tasks (pure planning; nothing runs)."""
    from runner.core import planner
    return planner.backfill(ws, jobs, lo, hi, at, downstream=downstream)


def existing_outputs(ws: Workspace, ledger, tasks) -> int:
    """How many of the tasks' windows already have an output that a forced run would replace."""
    by_job: dict[str, list[str]] = {}
    for t in tasks:
        by_job.setdefault(t.job, []).append(t.window.key)
    count = 0
    for job, keys in by_job.items():
        rows = ledger.state_rows(job, keys)
        count += sum(1 for r in rows.values() if r.get("output"))
    return count


def backfill(root: Path | str, jobs: list[str], lo: str | None, hi: str | None, at: datetime,
             ledger_url: str | None = None, downstream: bool = False, workers: int | None = None,
             force: bool = False, on_outcome=None, on_plan=None, should_stop=None) -> BackfillResult:
    """Run every due window of `jobs` starting in `[lo, hi)` that is not current.

    `on_plan(tasks, replaced)` is called before anything runs (so a caller can
    warn or confirm); `on_outcome(task, outcome)` after each window.
    """
    from runner.engine.pool import default_workers, run_tasks, warm_up

    warm_up()
    ws = load_workspace(root, thorough=False)
    if not jobs:
        raise UsageError("name at least one job to backfill (see `weir check` for the list)")
    first = ws.job(jobs[0]).name
    lo_t = parse_bound(ws, first, lo, "--from")
    hi_t = parse_bound(ws, first, hi, "--to")
    if lo_t is not None and hi_t is not None and hi_t <= lo_t:
        raise UsageError("--to must be after --from")
    plan = plan_backfill(ws, jobs, lo_t, hi_t, at, downstream)
    ledger = open_ledger(ws.root, ledger_url)
    replaced = existing_outputs(ws, ledger, plan.tasks) if force else 0
    if on_plan is not None and on_plan(plan.tasks, replaced) is False:
        return BackfillResult([], plan.not_due, replaced)
    from runner.engine.window import RunContext
    from runner.io.outputs import sweep_temporaries

    sweep_temporaries(ws, at)
    outcomes = run_tasks(plan.tasks, RunContext(ws=ws, ledger=ledger), workers or default_workers(), force=force,
                         on_outcome=on_outcome, should_stop=should_stop)
    return BackfillResult(outcomes, plan.not_due, replaced)


def history(root: Path | str, job: str, window_id: str | None = None, ledger_url: str | None = None,
            limit: int | None = None) -> list[dict[str, Any]]:
    """Runs of `job` (of one window), newest first, as plain dicts."""
    ws = load_workspace(root, thorough=False)
    ws.job(job)
    key = find_window(ws, job, window_id).key if window_id else None
    ledger = open_ledger(ws.root, ledger_url, create=False)
    rows = ledger.history(job, key, limit)
    live = ledger.claimed(job)
    for row in rows:
        if row["status"] == "running" and (job, row["window_key"]) not in live:
            row["status"] = "abandoned"  # no live claim: the process running it has ended
    late_after = ws.jobs[job].spec.late_after
    for row in rows:
        row["late"] = bool(late_after is not None and row.get("ingested_at") and row.get("window_end")
                           and parse_utc(row["window_end"]) + late_after
                           < datetime.strptime(row["ingested_at"], "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC))
    return rows


# ---------------------------------------------------------------- planning and explaining


def _survey(ws: Workspace, ledger, at: datetime, jobs: list[str] | None, recheck_all: bool = False):
    from runner.engine.survey import survey

    return survey(ws, ledger, at, jobs, recheck_all)


def _item(item) -> dict[str, Any]:
    return {"job": item.job, "window": item.window.id, "window_utc": item.window.key, "state": item.state,
            "reason": item.reason, "late": item.late}


def plan(root: Path | str, jobs: list[str], at: datetime, ledger_url: str | None = None) -> list[dict[str, Any]]:
    """Per job in dependency order: due windows (missing, failed with retries left, stale) and waiting ones."""
    from runner.core.planner import job_plans

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    assessed = _survey(ws, ledger, at, jobs)
    out = []
    for p in job_plans(ws, assessed, cap=False):
        out.append({
            "job": p.job, "due": [_item(i) for i in p.due], "waiting": [_item(i) for i in p.waiting],
            "counts": p.counts, "late": p.late, "max_catch_up": ws.jobs[p.job].spec.max_catch_up,
        })
    out.extend(_unplanned_entries(ws, assessed))
    return out


def _unplanned_entries(ws: Workspace, assessed: Any) -> list[dict[str, Any]]:
    """Plan entries for jobs that could not be planned, each with its error, in job order."""
    unplanned = getattr(assessed, "unplanned", {})
    return [{"job": job, "due": [], "waiting": [], "counts": {}, "late": 0,
             "max_catch_up": ws.jobs[job].spec.max_catch_up, "error": unplanned[job]}
            for job in ws.order if job in unplanned]


@dataclass
class TickResult:
    ran: bool
    holder: str | None = None
    outcomes: list[Any] = field(default_factory=list)
    held_back: dict[str, int] = field(default_factory=dict)
    waiting: dict[str, int] = field(default_factory=dict)
    unplanned: dict[str, str] = field(default_factory=dict)  # job -> why it could not be planned

    def counts(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for o in self.outcomes:
            out[o.status] = out.get(o.status, 0) + 1
        return out


def tick(root: Path | str, at: datetime, ledger_url: str | None = None, workers: int | None = None,
         should_stop=None, on_outcome=None, ws: Workspace | None = None) -> TickResult:
    """Plan, then run what is due (oldest first, `max_catch_up` per job), one tick per workspace at a time."""
    from runner.core.planner import job_plans, tasks_for
    from runner.core.workspace import producer_windows
    from runner.engine import gate
    from runner.engine.pool import run_tasks
    from runner.engine.window import RunContext
    from runner.io.ledger.leases import HeldLock
    from runner.io.ledger.owners import owner_id
    from runner.io.outputs import sweep_temporaries

    ws = ws or load_workspace(root, thorough=False)
    watch = _gate_watch(ws)
    # what the gate watches, seen before planning: a change while the tick plans must not be absorbed
    seen = _gate_files(ws, watch)
    ledger = open_ledger(ws.root, ledger_url)
    owner = owner_id()
    idle = None
    try:
        with HeldLock(ledger, "tick", owner, ws.settings.lease.total_seconds()) as lock:
            if not lock.acquired:
                return TickResult(ran=False, holder=lock.holder())
            sweep_temporaries(ws, at)
            before = gate.ledger_stat(ws.root, ledger_url)  # this tick only reads it from here on
            assessed = _survey(ws, ledger, at, None)
            plans = job_plans(ws, assessed, cap=True)
            items = [i for p in plans for i in p.due]
            if (not items and not any(p.counts.get("running") for p in plans) and not assessed.unplanned
                    and gate.ledger_stat(ws.root, ledger_url) == before):
                idle = assessed  # nothing due, nobody mid-window, no write while planning: may stop early
            # waiting windows whose producers run in this tick go along; they run if those finish
            runnable = {(i.job, i.window.key) for i in items}
            for p in plans:
                for w in p.waiting:
                    if any((pjob, pw.key) in runnable for _, pjob, pw in producer_windows(ws, w.job, w.window)):
                        items.append(w)
            tasks = tasks_for(ws, _dependency_sorted(ws, items))
            outcomes = run_tasks(tasks, RunContext(ws=ws, ledger=ledger, owner=owner), workers or 1,
                                 on_outcome=on_outcome, should_stop=should_stop, leases=lock.leases)
            return TickResult(True, None, outcomes, {p.job: p.held_back for p in plans if p.held_back},
                              {p.job: len(p.waiting) for p in plans if p.waiting}, dict(assessed.unplanned))
    finally:
        ledger.dispose()  # closes SQLite cleanly (a checkpoint) before the gate looks at its file
        _update_gate(ws, ledger_url, idle, at, watch, seen)


def stale(root: Path | str, jobs: list[str], at: datetime, ledger_url: str | None = None
          ) -> dict[str, Any]:
    """Every done window whose fingerprint differs from now, by component; grouped ranges and every window."""
    import polars as pl

    from runner.core.planner import stale_ranges

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    assessed = _survey(ws, ledger, at, jobs, recheck_all=True)
    windows_out = []
    for job, frame in assessed.items():
        for row in frame.filter(pl.col("state") == "stale").select("window", "window_key", "reasons",
                                                                      "pending").iter_rows(named=True):
            windows_out.append({"job": job, "window": row["window"], "window_utc": row["window_key"],
                                "reasons": row["reasons"], "pending_upstream": row["pending"]})
    ranges = [r.__dict__ for r in stale_ranges(ws, assessed)]
    return {"ranges": ranges, "windows": windows_out, "unplanned": dict(assessed.unplanned)}


def why(root: Path | str, job: str, window_id: str, at: datetime, ledger_url: str | None = None) -> dict[str, Any]:
    """One window explained: state, what changed since its recorded run, lateness, last run figures."""
    import polars as pl

    from runner.core import explain
    from runner.core.planner import parse_run_time
    from runner.engine.window import prepare, spec_and_code

    ws = load_workspace(root, thorough=False)
    ws.job(job)
    window = find_window(ws, job, window_id)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    cad = ws.cadence(job)
    out: dict[str, Any] = {"job": job, "window": window.id, "window_utc": window.key,
                           "end": format_instant(window.end, cad.tz), "length": format_duration(window.length)}
    if window.end + cad.settle > at:
        out.update(state="not due", reason=f"due at {format_instant(window.end + cad.settle, cad.tz)}")
        return out
    from runner.engine.survey import survey

    surveyed = survey(ws, ledger, at, [job], recheck_all=True, extras=True)
    if job in surveyed.unplanned:
        raise WeirError(f"{job} could not be planned: {surveyed.unplanned[job]}")
    assessed = surveyed[job]
    row = assessed.filter(pl.col("window_key") == window.key).row(0, named=True)
    out.update(state=row["state"], reason=row["reason"], reasons=row["reasons"], pending_upstream=row["pending"])
    state = ledger.state_row(job, window.key)
    runs = ledger.history(job, window.key, limit=1)
    last = runs[0] if runs else None
    if last:
        out["last_run"] = {k: last[k] for k in (
            "id", "status", "started_at", "finished_at", "seconds", "step_seconds", "rows_read", "rows_dropped",
            "rows_rejected", "rows_written", "output", "output_digest", "fingerprint", "error", "failed_check",
            "code_version", "host", "forced")}
    if state is not None and state.get("ingested_at"):
        ingested = parse_run_time(state["ingested_at"])
        lateness = ingested - window.end
        late_after = ws.jobs[job].spec.late_after
        out["ingestion"] = {
            "newest_input": state["ingested_at"],
            "after_window_end": format_duration(lateness) if lateness.total_seconds() > 0 else "PT0S",
            "late": bool(late_after is not None and lateness > late_after),
            "late_after": format_duration(late_after) if late_after else None,
        }
    if state is not None and state["state"] in ("done", "failed") and state.get("fp_spec"):
        ctx = _context(ws, ledger)
        prep = prepare(ctx, job, window)
        spec_now, code_now = spec_and_code(ws, job)
        changes: dict[str, Any] = {}
        if state["fp_spec"] != spec_now.hash:
            changes["spec"] = explain.spec_changes(ledger.text(state["fp_spec"]), spec_now.text)
        if state["fp_code"] != code_now.hash:
            changes["code"] = explain.code_diff(ledger.text(state["fp_code"]), code_now.text)
        if state["fp_input"] != prep.parts["input"].hash:
            # a database input's rows are read by a run only: absent from `prep`, not removed
            tables = {n for n, s in ws.jobs[job].spec.inputs.items() if isinstance(s, DatabaseInput)}
            found = [c for c in explain.input_changes(ledger.text(state["fp_input"]), prep.parts["input"].text)
                     if c["input"] not in tables]
            if found:
                changes["input"] = found
        if state["fp_upstream"] != prep.parts["upstream"].hash:
            changes["upstream"] = explain.upstream_changes(ledger.text(state["fp_upstream"]),
                                                           prep.parts["upstream"].text)
        if state.get("output_state"):
            changes["output"] = f"the output was found {state['output_state']} by weir verify"
        out["changes"] = changes
        if prep.waiting:
            out["waiting"] = prep.waiting
    return out


def _context(ws: Workspace, ledger):
    from runner.engine.window import RunContext

    return RunContext(ws=ws, ledger=ledger)


def impact(root: Path | str, at: datetime, ledger_url: str | None = None, workers: int | None = None
           ) -> list[dict[str, Any]]:
    """Per job: how many done windows the current job files would recompute, by reason, and how long."""
    import polars as pl

    from runner.engine.pool import default_workers

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    assessed = _survey(ws, ledger, at, None)
    workers = workers or default_workers()
    out = []
    for job, frame in assessed.items():
        stale_rows = frame.filter(pl.col("state") == "stale")
        by_reason: dict[str, int] = {}
        for reasons in stale_rows["reasons"].to_list():
            for r in reasons:
                by_reason[r] = by_reason.get(r, 0) + 1
        stats = ledger.run_stats(job).filter(pl.col("status") == "done")
        median = stats["seconds"].median() if stats.height else None
        count = stale_rows.height
        out.append({
            "job": job, "windows": count, "by_reason": by_reason,
            "pending_upstream": int(stale_rows["pending"].sum()) if count else 0,
            "median_seconds": median,
            "estimated_seconds": (median * count / workers) if median is not None else None,
        })
    out.extend({"job": job, "windows": 0, "by_reason": {}, "pending_upstream": 0, "median_seconds": None,
                "estimated_seconds": None, "error": why} for job, why in assessed.unplanned.items())
    return out


def verify(root: Path | str, jobs: list[str], ledger_url: str | None = None) -> list[dict[str, Any]]:
    """Re-read every done window's output; report (and mark stale by output) missing, changed or
    unreadable ones (a file that cannot be read, a database that is not one)."""
    import polars as pl

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    problems = []
    for job in ws.select(jobs):
        states = ledger.states(job).filter(pl.col("state") == "done")
        bad: dict[str, list[str]] = {"missing": [], "changed": [], "unreadable": []}
        fine: list[str] = []
        broken: str | None = None  # why the job's output database cannot be read, once found
        for row in states.iter_rows(named=True):
            if broken is None:
                verdict, detail = _verify_output(ws, job, row)
                if verdict == "unreadable" and ws.jobs[job].spec.output.path is None:
                    broken = detail
            else:
                verdict, detail = "unreadable", broken
            if verdict:
                bad[verdict].append(row["window_key"])
                problems.append({"job": job, "window": row["window_id"], "output": row["output"],
                                 "problem": verdict, "detail": detail})
            elif row["output_state"]:
                fine.append(row["window_key"])
        for verdict, keys in bad.items():
            if keys:
                ledger.set_output_state(job, keys, verdict)
        if fine:
            ledger.set_output_state(job, fine, None)
    return problems


def _verify_output(ws: Workspace, job: str, row: dict[str, Any]) -> tuple[str | None, str | None]:
    """One done window's output against the ledger: (None | missing | changed | unreadable, detail)."""
    import sqlalchemy as sa

    from runner.core.paths import database_url
    from runner.io.files import file_sha256
    from runner.io.outputs import read_table_digest
    from runner.io.readers import table_rows

    out = ws.jobs[job].spec.output
    if out.path is not None:
        path = ws.root / row["output"]
        if not path.exists():
            return "missing", None
        try:
            same = not row["output_checksum"] or file_sha256(path) == row["output_checksum"]
        except OSError as exc:
            return "unreadable", exc.strerror or str(exc)
        return (None if same else "changed"), None
    url = database_url(ws.root, out.database)
    try:
        digest = read_table_digest(url, out.table, row["window_key"])
        if digest is None:
            return "missing", None
        if digest == row["output_digest"]:
            return None, None
        if table_rows(url, out.table, [row["window_key"]]).height == 0:
            return "missing", None  # the window's rows were deleted (a run that wrote none matches)
        return "changed", None
    except sa.exc.OperationalError as exc:  # locked, cannot connect: the database is there, not reachable now
        raise WeirError(f"cannot read table {out.table} of job {job}: {_first_line(exc)}") from None
    except sa.exc.DatabaseError as exc:  # not a database, malformed: the output is damaged
        return "unreadable", _first_line(exc)


def _first_line(exc: BaseException) -> str:
    return str(getattr(exc, "orig", None) or exc).splitlines()[0]


def _dependency_sorted(ws: Workspace, items: list) -> list:
    rank = {name: i for i, name in enumerate(ws.order)}
    return sorted(items, key=lambda i: (rank[i.job], i.window.start))


def _gate_watch(ws: Workspace) -> tuple[list[str], list[str]] | None:
    """The input templates and python step module files the tick gate watches (None: cannot watch)."""
    from runner.engine.steps import StepError, _module_file
    from runner.model.spec import FileInput as _FileInput
    from runner.model.spec import PythonStep

    templates = sorted({s.files for j in ws.jobs.values() for s in j.spec.inputs.values()
                        if isinstance(s, _FileInput)})
    modules = []
    try:
        for job in ws.jobs.values():
            for step in job.spec.steps:
                if isinstance(step, PythonStep):
                    modules.append(str(_module_file(ws.root, step.python.split(":")[0])))
    except StepError:
        return None
    return templates, sorted(set(modules))


def _gate_files(ws: Workspace, watch: tuple[list[str], list[str]] | None) -> str | None:
    from runner.engine import gate
    return gate.observe_files(ws.root, *watch) if watch is not None else None


def _update_gate(ws: Workspace, ledger_url: str | None, assessed, at: datetime,
                 watch: tuple[list[str], list[str]] | None, seen: str | None) -> None:
    """Write the tick gate after a tick that found nothing due (`assessed`), else remove it."""
    from runner.core.planner import next_change
    from runner.engine import gate

    if assessed is None or watch is None:
        gate.clear(ws.root)
        return
    gate.write(ws.root, ledger_url, *watch, next_change(ws, assessed, at), seen=seen)


# ---------------------------------------------------------------- demo and new workspaces


def demo(root: Path | str, now: datetime, ledger_url: str | None = None, workers: int | None = None,
         on_outcome=None, on_plan=None):
    """Write the demo's landing data (unchanged files are left alone) and backfill every demo job."""
    from runner.scaffold import demo as scenario
    root = Path(root).resolve()
    missing = scenario.missing_jobs(root)
    if missing:
        raise UsageError(
            f"weir demo runs in a workspace holding the example jobs ({', '.join(scenario.DEMO_JOBS)}); "
            f"{root} lacks {', '.join(missing)}. Run it in the weir repository root, or start a workspace "
            "of your own with `weir init DIR`.")
    summary = scenario.write_landing(root)
    at = scenario.demo_clock(now)
    result = backfill(root, list(scenario.DEMO_JOBS), None, None, at, ledger_url, workers=workers,
                      on_outcome=on_outcome, on_plan=on_plan)
    return summary, result, at


INIT_JOB = """\
# An example job: rides per hour and zone from CSV files that land in state/landing/rides/.
# Check it with `weir check`, list its windows with `weir windows rides_per_hour`,
# run what is due with `weir tick` (or a range with `weir backfill rides_per_hour --from ... --to ...`).
description: Rides per hour and zone.
window:
  every: 1h                      # or 15m, 1d, 1w, 1mo; or cron: "0 6 * * 1"
  start: {start}                 # local time in the timezone below
  timezone: UTC                  # an IANA name, e.g. Europe/Lisbon
  settle: 10m                    # a window is due 10 minutes after it ends
inputs:
  rides:
    files: state/landing/rides/{{start:%Y-%m-%d}}/*.csv   # one folder per day
    time_column: started_at      # keep only rows inside the window
    schema:                      # checked before anything is summed
      ride_id: {{type: str, nullable: false}}
      started_at: datetime
      zone: str
      amount: {{type: "decimal(10,2)", min: 0}}
steps:
  - sql: |
      SELECT zone, COUNT(*) AS rides, SUM(amount) AS revenue
      FROM rides
      GROUP BY zone
output:
  path: state/warehouse/rides_per_hour/{{start:%Y-%m-%d}}/{{start:%H}}.parquet
  checks:
    - key: [zone]                # one row per zone, or the window fails and the old output stays
"""

STATE_README = """\
# state/

Runtime state of this workspace: the ledger (`ledger.sqlite`), failed windows' logs
(`logs/`), and data folders. Deleting `ledger.sqlite` makes weir forget every run.
"""


def init(target: Path | str, now: datetime) -> list[str]:
    """Create a new workspace with jobs/, state/ and one commented example job; return what was written."""
    root = Path(target)
    jobs = root / "jobs"
    example = jobs / "rides_per_hour.yaml"
    if jobs.is_dir() and any(jobs.iterdir()):
        raise UsageError(f"{jobs} already has job files; weir init only starts new workspaces")
    written = []
    jobs.mkdir(parents=True, exist_ok=True)
    (root / "state").mkdir(exist_ok=True)
    start = now.strftime("%Y-%m-%dT00:00")
    example.write_text(INIT_JOB.format(start=start))
    written.append(str(example))
    readme = root / "state" / "README.md"
    if not readme.exists():
        readme.write_text(STATE_README)
        written.append(str(readme))
    gitignore = root / "state" / ".gitignore"
    if not gitignore.exists():
        gitignore.write_text("*\n!.gitignore\n!README.md\n")
        written.append(str(gitignore))
    return written


def advise(root: Path | str, jobs: list[str], ledger_url: str | None = None) -> list[dict[str, Any]]:
    """Per job: rows and seconds per window (median, p95), overhead share, and suggestions."""
    from runner.core.advice import advise_job

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    out = []
    for job in ws.select(jobs):
        cad = ws.cadence(job)
        what = f"every {cad.every}" if cad.every else f"cron '{cad.cron}'"
        out.append(advise_job(job, what, ledger.run_stats(job)).as_dict())
    return out
