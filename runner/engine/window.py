"""One attempt at one window, end to end: the only place that sequences effects.

    find inputs -> fingerprint -> claim, skip if current, record start
    -> read, steps, write to a temporary file -> checks
    -> confirm the claim -> swap -> record done (only while still holding the claim)

`run_attempt` is the one entry point: a local worker process runs it, and so
would any other executor. A window whose inputs or producers are not there
yet is `waiting` (nothing is recorded). A failure records its error in the
ledger and its traceback in `state/logs/JOB/WINDOW.log`, and leaves the
previous output in place; the supervisor (runner.engine.pool) retries it up to
`retries:` times with a doubling delay, holding the claim in between. A run
whose claim another runner took over (its lease lapsed) neither swaps its
output nor records done.
"""

from __future__ import annotations

import contextlib
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from runner import __version__
from runner.core import fingerprints as fp
from runner.core.paths import database_url, render
from runner.core.states import RunStatus, State, Status
from runner.core.windows import Window
from runner.core.workspace import Workspace
from runner.engine.context import RunContext
from runner.engine.prepare import Prepared, Producer, code_version, prepare
from runner.io.ledger.store import utc_text
from runner.model.spec import DatabaseInput, FileInput, JobInput

# Below this much input a window runs in memory in one go (no streaming engine
# start-up, no reading the result back); above it, polars streams to the file.
SMALL_INPUT_BYTES = 64 * 1024 * 1024


@dataclass
class Outcome:
    """What happened to one window."""

    job: str
    window: str
    status: str  # done | failed | skipped | waiting | claimed | not started
    reason: str = ""
    run_id: int | None = None
    seconds: float = 0.0
    step_seconds: float = 0.0
    rows_written: int | None = None
    error: str | None = None

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Attempt:
    """One attempt at one window: what a worker is handed.

    `fence` is the claim an earlier attempt took and the supervisor kept (a
    retry); None means take the claim first.
    """

    job: str
    window_key: str
    number: int = 1
    force: bool = False
    fence: int | None = None


class ClaimLost(Exception):
    """Another runner took this window's claim over; the run must not swap or record done."""


LOST = "claim lost: another runner took this window over (this run's lease lapsed); its result was discarded"


# ---------------------------------------------------------------- preparing


# ---------------------------------------------------------------- running


def precheck(ctx: RunContext, job: str, window: Window) -> bool:
    """Whether the window is done with the fingerprint it would have now.

    A cheap check without a claim, so that a supervisor skips current windows
    without handing them to a worker; `run_attempt` compares again under its claim.
    """
    from runner.errors import WeirError

    if any(isinstance(s, DatabaseInput) for s in ctx.ws.jobs[job].spec.inputs.values()):
        return False  # the rows must be read to know
    try:
        prep = prepare(ctx, job, window)
    except (WeirError, OSError):
        return False
    current = ctx.ledger.state_row(job, window.key)
    if current is None or current["state"] != State.DONE or current.get("output_state"):
        return False
    return prep.waiting is None and prep.fingerprint == current["fingerprint"]


def run_attempt(ctx: RunContext, attempt: Attempt,
                on_claim: Callable[[int, int, str | None], None] | None = None) -> Outcome:
    """Run one attempt at a window; the entry point of every worker.

    Finds the inputs and fingerprint (reads only), then in one ledger
    transaction takes the claim and skips a current window or records the run
    (a retry already holds the claim: `attempt.fence`). `on_claim(fence,
    run_id, fingerprint)` is told as soon as the claim is held, so that the
    supervisor can renew it and record a failure if this process dies. On a
    failure that will be retried, the claim stays held; otherwise it is released.
    """
    from runner.io.databases import database_frame
    from runner.io.inspect import InputStats

    ws = ctx.ws
    job, force = attempt.job, attempt.force
    window = ws.cadence(job).window(_key_to_instant(attempt.window_key))
    spec = ws.jobs[job].spec
    stats = InputStats()
    run_id: int | None = None
    fence = attempt.fence
    fingerprint: str | None = None
    t0 = time.perf_counter()
    try:
        db_frames = {}
        db_entries = []
        for name, source in spec.inputs.items():
            if isinstance(source, DatabaseInput):
                frame, entry = database_frame(ws.root, name, source, window, ws.cadence(job).tz.key, stats)
                db_frames[name] = frame
                db_entries.append(entry)
        prep = prepare(ctx, job, window, db_entries)
        fingerprint = prep.fingerprint
        if prep.waiting:
            if fence is not None:
                ctx.ledger.release(job, window.key, ctx.owner)
            return _timed(Outcome(job, window.id, Status.WAITING, prep.waiting), t0)
        values, texts = _run_values(ctx, job, window, prep, attempt.number, force), _texts(prep)
        if fence is None:
            status, run_id = ctx.ledger.begin_run(job, window.key, ctx.owner, ctx.lease,
                                                  None if force else prep.fingerprint, values, texts)
            if status == Status.CLAIMED:
                return _timed(Outcome(job, window.id, Status.CLAIMED, "another process is running this window"), t0)
            if status == "current":
                return _timed(Outcome(job, window.id, Status.SKIPPED, "current: already done with this fingerprint"), t0)
            assert run_id is not None
            fence = run_id
        else:
            current = ctx.ledger.state_row(job, window.key)
            if (not force and current is not None and current["state"] == State.DONE
                    and current["fingerprint"] == prep.fingerprint and not current.get("output_state")):
                ctx.ledger.release(job, window.key, ctx.owner)
                return _timed(Outcome(job, window.id, Status.SKIPPED, "current: already done with this fingerprint"), t0)
            run_id = ctx.ledger.start_run(values, texts, ctx.owner, fence, ctx.lease)
            if run_id is None:
                return _timed(Outcome(job, window.id, Status.CLAIMED, LOST), t0)
        if on_claim is not None:
            on_claim(fence, run_id, prep.fingerprint)
        return _timed(_execute(ctx, job, window, prep, run_id, fence, stats, db_frames, t0), t0)
    except ClaimLost:
        if run_id is not None:
            ctx.ledger.abandon_run(run_id, LOST)
        return _timed(Outcome(job, window.id, Status.CLAIMED, LOST, run_id), t0)
    except Exception as exc:  # noqa: BLE001 - every failure is recorded, none escapes
        outcome = record_failure(ctx, attempt, error_text(exc), run_id=run_id, fence=fence, fingerprint=fingerprint,
                                 stats=stats, exc=exc, seconds=time.perf_counter() - t0, on_claim=on_claim)
        return _timed(outcome, t0)


def _timed(outcome: Outcome, t0: float) -> Outcome:
    outcome.seconds = time.perf_counter() - t0
    return outcome


def _key_to_instant(key: str) -> str:
    return key.replace("Z", "+00:00")


def _run_values(ctx: RunContext, job: str, window: Window, prep: Prepared, attempt: int, force: bool
                ) -> dict[str, Any]:
    end_key = Window(window.end, window.end, window.tz).key
    ingested = (datetime.fromtimestamp(prep.ingested_ns / 1e9, UTC) if prep.ingested_ns else None)
    return {
        "job": job, "window_key": window.key, "window_end": end_key, "window_id": window.id,
        "attempt": attempt, "forced": force, "fingerprint": prep.fingerprint,
        **{f"fp_{c}": prep.parts[c].hash for c in fp.COMPONENTS},
        "code_version": code_version(ctx.ws.root), "weir_version": __version__,
        "ingested_at": utc_text(ingested) if ingested else None,
    }


def _texts(prep: Prepared) -> list[tuple[str, str, str]]:
    return [(prep.parts[c].hash, c, prep.parts[c].text) for c in fp.COMPONENTS]


def _execute(ctx: RunContext, job: str, window: Window, prep: Prepared, run_id: int, fence: int, stats: Any,
             db_frames: dict[str, Any], t0: float) -> Outcome:
    import polars as pl

    from runner.engine import steps
    from runner.engine.checks import check_output
    from runner.io import outputs as sinks
    from runner.io.readers import file_frame

    ws = ctx.ws
    spec = ws.jobs[job].spec
    tz = ws.cadence(job).tz.key
    frames: dict[str, pl.LazyFrame] = dict(db_frames)
    by_input: dict[str, list[Producer]] = {}
    for p in prep.producers:
        by_input.setdefault(p.input, []).append(p)
    for name, source in spec.inputs.items():
        if isinstance(source, FileInput):
            frames[name] = file_frame(ws.root, name, source, prep.files[name], window, tz, stats,
                                      empty_schema=None)
        elif isinstance(source, JobInput):
            frames[name] = _producer_frame(ws, source, by_input.get(name, []), stats)
    result = steps.build(spec, frames, window, ws.root)
    out = spec.output
    stamps = None
    if out.stamp:
        stamps = {"window_start": window.start, "window_end": window.end, "run_id": run_id,
                  "code_version": code_version(ws.root) or ""}
    step_start = time.perf_counter()
    previous = _previous_output(ctx, job, window)
    if out.path is not None:
        relative = render(out.path, window)
        staged = sinks.stage_file(ws.root, relative, result, out.file_format, stamps,
                                  streaming=_input_bytes(ws, prep) > SMALL_INPUT_BYTES)
        rejected_stage = None
        try:
            step_seconds = time.perf_counter() - step_start
            stats.check_fractions()
            check_output(staged.scan(), list(out.checks), previous, output=relative)
            rejected_path = relative + ".rejected.parquet"
            if stats.rejected:
                rejected_stage = sinks.stage_frame_file(ws.root, rejected_path, pl.concat(stats.rejected,
                                                                                        how="diagonal_relaxed"))
            _confirm(ctx, job, window, fence)  # fencing: only the claim's holder swaps
        except BaseException:
            staged.discard()
            if rejected_stage is not None:
                rejected_stage.discard()
            raise
        staged.commit()
        if rejected_stage is not None:
            rejected_stage.commit()
        else:
            sinks.remove(ws.root, rejected_path)
        location, rows, digest, checksum = relative, staged.rows, staged.digest, staged.checksum
    else:
        frame = result.collect(engine="streaming")
        if stamps:
            frame = frame.with_columns([pl.lit(v).alias(k) for k, v in stamps.items() if k != "window_start"])
        step_seconds = time.perf_counter() - step_start
        stats.check_fractions()
        check_output(frame.lazy(), list(out.checks), previous, output=f"table {out.table}")
        _confirm(ctx, job, window, fence)  # fencing: only the claim's holder replaces the rows
        assert out.database is not None and out.table is not None  # a table output
        rows, digest = sinks.write_table(database_url(ws.root, out.database), out.table, frame, window.key)
        location, checksum = f"table {out.table}", None
    finished = {
        "status": RunStatus.DONE, "seconds": time.perf_counter() - t0, "step_seconds": step_seconds,
        "rows_read": stats.rows_read if stats.counted else None, "rows_dropped": stats.rows_dropped,
        "rows_rejected": stats.rows_rejected, "rows_written": rows, "output": location,
        "output_digest": digest, "output_checksum": checksum,
    }
    state = {
        "window_end": Window(window.end, window.end, window.tz).key, "window_id": window.id, "state": State.DONE,
        "fingerprint": prep.fingerprint, **{f"fp_{c}": prep.parts[c].hash for c in fp.COMPONENTS},
        "output": location, "output_digest": digest, "output_checksum": checksum,
        "ingested_at": _ingested(prep), "seconds": finished["seconds"], "last_fingerprint": prep.fingerprint,
        "output_state": None,
    }
    if not ctx.ledger.finish_run(run_id, job, window.key, ctx.owner, fence, finished, state, release=True):
        return Outcome(job, window.id, Status.CLAIMED, LOST, run_id)
    return Outcome(job, window.id, Status.DONE, "ran", run_id, step_seconds=step_seconds, rows_written=rows)


def _confirm(ctx: RunContext, job: str, window: Window, fence: int) -> None:
    """Raise ClaimLost unless this run still holds the window's claim; extend its lease for the swap."""
    if not ctx.ledger.confirm(job, window.key, ctx.owner, fence, ctx.lease):
        raise ClaimLost


def _input_bytes(ws: Workspace, prep: Prepared) -> int:
    """Bytes of the window's input files and producer outputs (database rows are in memory already)."""
    import os

    total = 0
    for found in prep.files.values():
        for path in found.paths:
            with contextlib.suppress(OSError):
                total += os.path.getsize(path)
    for p in prep.producers:
        if p.state and p.state.get("output") and not str(p.state["output"]).startswith("table "):
            with contextlib.suppress(OSError):
                total += os.path.getsize(ws.root / p.state["output"])
    return total


def _ingested(prep: Prepared) -> str | None:
    if not prep.ingested_ns:
        return None
    return utc_text(datetime.fromtimestamp(prep.ingested_ns / 1e9, UTC))


def _producer_frame(ws: Workspace, source: JobInput, producers: list[Producer], stats: Any) -> Any:
    import polars as pl

    from runner.core.sqlcheck import declared_schema
    from runner.io.databases import table_rows
    from runner.io.readers import output_frame

    empty = declared_schema(source.columns) or ws.output_schemas.get(source.job)
    out = ws.jobs[source.job].spec.output
    if out.path is not None:
        paths = [str(ws.root / p.state["output"]) for p in producers if p.state and p.state.get("output")]
        if not paths and empty is None:
            from runner.io.inputfiles import InputError

            raise InputError(f"input from job {source.job} is empty here and its columns are unknown; "
                             "declare them with schema: under this input")
        frame = output_frame(paths, dict(empty) if empty is not None else None)
        if paths and all(p.endswith(".parquet") for p in paths):
            rows = pl.scan_parquet(paths).select(pl.len()).collect().item()  # from the files' metadata
            with stats.lock:
                stats.rows_read += rows
                stats.counted = True
        return frame
    keys = [p.window.key for p in producers]
    assert out.database is not None and out.table is not None  # a table output
    rows = table_rows(database_url(ws.root, out.database), out.table, keys) if keys else None
    if rows is None or (rows.height == 0 and empty is not None and not rows.columns):
        return pl.LazyFrame(schema=dict(empty) if empty is not None else {})
    return rows.lazy()


def _previous_output(ctx: RunContext, job: str, window: Window) -> Any:
    """The previous window's output (for `change` checks), or None."""
    out = ctx.ws.jobs[job].spec.output
    if not any(c.change is not None for c in out.checks):
        return None
    earlier = ctx.ws.cadence(job).shift(window, 1)
    if earlier is None:
        return None
    state = ctx.ledger.state_row(job, earlier.key)
    if state is None or state["state"] != State.DONE or not state.get("output"):
        return None
    import polars as pl

    from runner.io.databases import table_rows

    if out.path is not None:
        path = ctx.ws.root / state["output"]
        if not path.exists():
            return None
        return pl.scan_parquet(path) if out.file_format == "parquet" else pl.scan_csv(path)
    assert out.database is not None and out.table is not None  # a table output
    return table_rows(database_url(ctx.ws.root, out.database), out.table, [earlier.key]).lazy()


def error_text(exc: BaseException) -> str:
    """One or two lines for the ledger and the terminal; the traceback goes to the log."""
    from runner.engine.checks import CheckFailed

    if isinstance(exc, CheckFailed):
        return str(exc)
    text = str(exc).strip()
    inner = text
    for marker in ("BadRows: ", "InputError: "):
        if marker in text:
            inner = text.split(marker, 1)[1]
    lines = [ln for ln in inner.splitlines() if ln.strip()]
    first = lines[0] if lines else type(exc).__name__
    from runner.errors import WeirError

    if isinstance(exc, WeirError) or inner != text:
        return first
    return f"{type(exc).__name__}: {first}"


def log_path(root: Path, job: str, window: Window) -> Path:
    from runner.core.paths import LOGS

    return root / LOGS / job / f"{window.id.replace('/', '_')}.log"


def record_failure(ctx: RunContext, attempt: Attempt, message: str, run_id: int | None = None,
                   fence: int | None = None, fingerprint: str | None = None, stats: Any = None,
                   exc: BaseException | None = None, seconds: float = 0.0,
                   on_claim: Callable[[int, int, str | None], None] | None = None) -> Outcome:
    """Record a failed attempt (log, run row, window state) under the window's claim; the Outcome.

    Used by workers for exceptions and by the supervisor for a worker that
    died or ran out of time. Without a run yet, the claim is taken first (a
    live holder elsewhere makes this `claimed`, nothing recorded). The claim
    is kept when a retry will follow, else released. A forced re-run of a
    window whose previous output is intact and current leaves the window done
    (the failed attempt stays in its history).
    """
    from runner.engine.checks import CheckFailed
    from runner.errors import WeirError
    from runner.io.outputs import open_append

    job = attempt.job
    window = ctx.ws.cadence(job).window(_key_to_instant(attempt.window_key))
    path = log_path(ctx.ws.root, job, window)
    try:
        with open_append(ctx.ws.root, str(path.relative_to(ctx.ws.root))) as fh:
            fh.write(f"=== {utc_text()} {job} {window.id} attempt {attempt.number} run {run_id}\n{message}\n\n")
            if exc is not None:
                fh.write("".join(traceback.format_exception(exc)))
                fh.write("\n")
    except (OSError, WeirError):  # no log (say, state/logs leads outside the workspace); the ledger has the error
        pass
    prep = None
    if fingerprint is None or run_id is None:
        try:
            prep = prepare(ctx, job, window)
            fingerprint = fingerprint or prep.fingerprint
        except Exception:  # noqa: BLE001 - preparing itself failed; record what we can
            prep = None
    end_key = Window(window.end, window.end, window.tz).key
    if prep is not None:
        values = _run_values(ctx, job, window, prep, attempt.number, attempt.force)
        texts = _texts(prep)
    else:
        values = {"job": job, "window_key": window.key, "window_end": end_key, "window_id": window.id,
                  "attempt": attempt.number, "forced": attempt.force}
        texts = []
    if run_id is None and fence is not None:
        run_id = ctx.ledger.start_run(values, texts, ctx.owner, fence, ctx.lease)
        if run_id is None:
            return Outcome(job, window.id, Status.CLAIMED, LOST, error=message)
    elif run_id is None:
        status, run_id = ctx.ledger.begin_run(job, window.key, ctx.owner, ctx.lease, None, values, texts)
        if status != "started" or run_id is None:
            return Outcome(job, window.id, Status.CLAIMED, "another process is running this window", error=message)
        fence = run_id
        if on_claim is not None:
            on_claim(fence, run_id, fingerprint)
    assert fence is not None
    finished = {
        "status": RunStatus.FAILED, "seconds": seconds, "error": message,
        "failed_check": exc.check if isinstance(exc, CheckFailed) else None,
        "rows_read": stats.rows_read if stats is not None and stats.counted else None,
        "rows_dropped": stats.rows_dropped if stats is not None else None,
        "rows_rejected": stats.rows_rejected if stats is not None else None,
    }
    reason = message
    state: dict[str, Any] | None = {"window_end": end_key, "window_id": window.id, "state": State.FAILED,
                                    "seconds": seconds}
    if attempt.force and fingerprint is not None and _intact_and_current(ctx, job, window, fingerprint):
        state = None
        reason = f"{message} (the previous output is intact and current: the window stays done)"
    final = attempt.number > ctx.ws.jobs[job].spec.retries
    if not ctx.ledger.finish_run(run_id, job, window.key, ctx.owner, fence, finished, state, release=final):
        return Outcome(job, window.id, Status.CLAIMED, LOST, run_id, error=message)
    return Outcome(job, window.id, Status.FAILED, reason, run_id, error=message)


def _intact_and_current(ctx: RunContext, job: str, window: Window, fingerprint: str) -> bool:
    """Whether the window is recorded done with `fingerprint` and its output is still what was recorded."""
    from runner.io.files import file_sha256
    from runner.io.outputs import read_table_digest

    state = ctx.ledger.state_row(job, window.key)
    if (state is None or state["state"] != State.DONE or state.get("output_state")
            or state["fingerprint"] != fingerprint or not state.get("output")):
        return False
    out = ctx.ws.jobs[job].spec.output
    try:
        if out.path is not None:
            return bool(state["output_checksum"]) and file_sha256(ctx.ws.root / state["output"]) == state[
                "output_checksum"]
        assert out.database is not None and out.table is not None  # a table output
        return read_table_digest(database_url(ctx.ws.root, out.database), out.table, window.key) == state["output_digest"]
    except Exception:  # noqa: BLE001 - an output that cannot be read is not intact
        return False
