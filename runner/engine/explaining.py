"""`weir why`: one window explained, from the ledger's record and the job files as they are now.

Each fingerprint component recorded for the window's last run (spec, code,
inputs, upstream outputs) is compared with what a run now would record, and
each difference is shown in words (`runner.core.explain` does the diffs).
"""

from __future__ import annotations

from datetime import datetime
from typing import TYPE_CHECKING, Any

from runner.core.states import State, Status
from runner.errors import WeirError
from runner.model.spec import DatabaseInput
from runner.model.timeutil import format_duration, format_instant

if TYPE_CHECKING:
    from runner.core.windows import Window
    from runner.core.workspace import Workspace
    from runner.io.ledger.store import Ledger


def explain_window(ws: Workspace, ledger: Ledger, job: str, window: Window, at: datetime) -> dict[str, Any]:
    """One window explained: state, what changed since its recorded run, lateness, last run figures.

    The keys, in this order: job, window, window_utc, end, length, state,
    reason; then when due reasons and pending_upstream; last_run, ingestion,
    changes and waiting where there is something to say.
    """
    import polars as pl

    from runner.core import explain
    from runner.core.assessment import parse_run_time
    from runner.engine.context import RunContext
    from runner.engine.prepare import prepare, spec_and_code
    from runner.engine.survey import survey

    cad = ws.cadence(job)
    out: dict[str, Any] = {"job": job, "window": window.id, "window_utc": window.key,
                           "end": format_instant(window.end, cad.tz), "length": format_duration(window.length)}
    if window.end + cad.settle > at:
        out.update(state=Status.NOT_DUE, reason=f"due at {format_instant(window.end + cad.settle, cad.tz)}")
        return out
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
    if state is not None and state["state"] in (State.DONE, State.FAILED) and state.get("fp_spec"):
        prep = prepare(RunContext(ws=ws, ledger=ledger), job, window)
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
