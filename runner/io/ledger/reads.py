"""The ledger's read queries: window states, runs and figures, as polars frames or plain rows.

`LedgerReads` is the reading half of `runner.io.ledger.store.Ledger` (a base
class: it uses the ledger's engine and transactions, and writes nothing).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from contextlib import AbstractContextManager
from typing import TYPE_CHECKING, Any

import sqlalchemy as sa

from runner.core.states import RunStatus, State
from runner.io.databases import rows_frame
from runner.io.ledger.schema import STATE_COLUMNS, STATE_ROW, runs, state_schema, windows

if TYPE_CHECKING:
    import polars as pl


class LedgerReads:
    """Read queries over a ledger's tables; `Ledger` supplies the engine and the transactions."""

    engine: sa.Engine | None

    def _tx(self, read: bool = False) -> AbstractContextManager[sa.Connection]:
        raise NotImplementedError

    # ------------------------------------------------------------ reading

    def states(self, job: str, lo_key: str | None = None, hi_key: str | None = None) -> pl.DataFrame:
        """Every window state row of `job` (optionally window_key in [lo, hi)), one query."""
        import polars as pl

        schema = state_schema()
        if self.engine is None:
            return pl.DataFrame(schema=schema)
        q = sa.select(*[windows.c[c] for c in STATE_COLUMNS]).where(windows.c.job == job)
        if lo_key is not None:
            q = q.where(windows.c.window_key >= lo_key)
        if hi_key is not None:
            q = q.where(windows.c.window_key < hi_key)
        with self._tx(read=True) as conn:
            rows = conn.execute(q).all()
        return rows_frame(rows, schema)

    def plan_states(self, job: str, spec_hash: str, code_hash: str, input_from: str | None = None,
                    upstream: bool = False, digests: bool = False, ingested: bool = False,
                    extras: bool = False) -> pl.DataFrame:
        """The window states planning needs, compactly: one query over every window of `job`
        and one over its failed (or flagged) windows.

        The state and the comparisons with the job-wide spec and code hashes come
        back as one small integer (so a year of windows does not bring back a year
        of identical hash strings); `fp_input` only for windows keyed at or after
        `input_from` (all when None) and windows not done. Columns: window_key,
        state, spec_ok, code_ok, fp_input, failures, finished_at, last_fingerprint,
        output_state, run_id; optionally fp_upstream, output_digest (`digests`),
        ingested_at, and output, seconds (`extras`).
        """
        import polars as pl

        c = windows.c
        not_done = c.state != State.DONE
        flags = (sa.case((c.state == State.DONE, 1), (c.state == State.FAILED, 2), else_=3)
                 + sa.case((c.fp_spec == spec_hash, 4), else_=0) + sa.case((c.fp_code == code_hash, 8), else_=0)
                 + sa.case((c.output_state.is_(None), 0), else_=16))
        columns: list[tuple[str, Any, Any]] = [
            ("window_key", c.window_key, pl.String), ("flags", flags, pl.Int64),
            ("fp_input", c.fp_input if input_from is None else
             sa.case((sa.or_(c.window_key >= input_from, not_done), c.fp_input), else_=None), pl.String),
        ]
        if upstream:
            columns.append(("fp_upstream", c.fp_upstream, pl.String))
        if digests:
            columns.append(("output_digest", c.output_digest, pl.String))
        if ingested or extras:
            columns.append(("ingested_at", c.ingested_at, pl.String))
        if extras:
            columns += [("output", c.output, pl.String), ("seconds", c.seconds, pl.Float64)]
        detail_columns: list[tuple[str, Any, Any]] = [
            ("window_key", c.window_key, pl.String), ("failures", c.failures, pl.Int64),
            ("finished_at", c.finished_at, pl.String), ("last_fingerprint", c.last_fingerprint, pl.String),
            ("output_state", c.output_state, pl.String),
        ]
        if self.engine is None:
            main = _frame([], columns)
            details = _frame([], detail_columns)
        else:
            with self._tx(read=True) as conn:
                # the DBAPI rows as they come: no per-row objects beyond the driver's tuples
                rows = conn.execute(sa.select(*[e.label(n) for n, e, _ in columns])
                                    .where(c.job == job)).cursor.fetchall()
                few = conn.execute(sa.select(*[e.label(n) for n, e, _ in detail_columns]).where(
                    c.job == job, sa.or_(c.state == State.FAILED, c.output_state.is_not(None)))).cursor.fetchall()
            main, details = _frame(rows, columns), _frame(few, detail_columns)
        code = pl.col("flags") % 4
        main = main.with_columns(
            pl.when(code == 1).then(pl.lit(State.DONE)).when(code == 2).then(pl.lit(State.FAILED))
            .otherwise(pl.lit("other")).alias("state"),
            ((pl.col("flags") // 4) % 2 == 1).alias("spec_ok"),
            ((pl.col("flags") // 8) % 2 == 1).alias("code_ok"),
        ).drop("flags")
        if extras:
            runs = (self._run_ids(job) if self.engine is not None else
                    _frame([], [("window_key", None, pl.String), ("run_id", None, pl.Int64)]))
            main = main.join(runs, on="window_key", how="left")
        return main.join(details, on="window_key", how="left").with_columns(pl.col("failures").fill_null(0))

    def _run_ids(self, job: str) -> pl.DataFrame:
        c = windows.c
        with self._tx(read=True) as conn:
            rows = conn.execute(sa.select(c.window_key, c.run_id).where(c.job == job)).cursor.fetchall()
        import polars as pl

        return _frame(rows, [("window_key", None, pl.String), ("run_id", None, pl.Int64)])

    def state_rows(self, job: str, keys: Iterable[str]) -> dict[str, dict[str, Any]]:
        """Window states by key for the given keys of one job (one range query)."""
        keys = list(keys)
        if not keys or self.engine is None:
            return {}
        q = sa.select(windows).where(windows.c.job == job, windows.c.window_key >= min(keys),
                                     windows.c.window_key <= max(keys))
        wanted = set(keys)
        with self._tx(read=True) as conn:
            return {r["window_key"]: dict(r) for r in conn.execute(q).mappings() if r["window_key"] in wanted}

    def state_row(self, job: str, key: str) -> dict[str, Any] | None:
        if self.engine is None:
            return None
        with self._tx(read=True) as conn:
            row = conn.execute(STATE_ROW, {"b_job": job, "b_key": key}).mappings().first()
        return dict(row) if row else None

    def done_keys(self, job: str) -> set[str]:
        """Keys of the windows of `job` recorded done (and not flagged by `weir verify`)."""
        if self.engine is None:
            return set()
        with self._tx(read=True) as conn:
            rows = conn.execute(sa.select(windows.c.window_key).where(
                windows.c.job == job, windows.c.state == State.DONE, windows.c.output_state.is_(None))).all()
        return {r[0] for r in rows}

    def run(self, run_id: int) -> dict[str, Any] | None:
        if self.engine is None:
            return None
        with self._tx(read=True) as conn:
            row = conn.execute(sa.select(runs).where(runs.c.id == run_id)).mappings().first()
        return dict(row) if row else None

    def history(self, job: str, key: str | None = None, limit: int | None = None) -> list[dict[str, Any]]:
        """Runs of `job` (of one window when `key`), newest first."""
        if self.engine is None:
            return []
        q = sa.select(runs).where(runs.c.job == job)
        if key is not None:
            q = q.where(runs.c.window_key == key)
        q = q.order_by(runs.c.id.desc())
        if limit:
            q = q.limit(limit)
        with self._tx(read=True) as conn:
            return [dict(r) for r in conn.execute(q).mappings()]

    def run_stats(self, job: str) -> pl.DataFrame:
        """Finished runs of `job` (seconds, step seconds, rows), for estimates and advice."""
        import polars as pl

        cols = ["window_key", "status", "seconds", "step_seconds", "rows_read", "rows_written", "started_at"]
        schema = {"window_key": pl.String, "status": pl.String, "seconds": pl.Float64,
                  "step_seconds": pl.Float64, "rows_read": pl.Int64, "rows_written": pl.Int64,
                  "started_at": pl.String}
        if self.engine is None:
            return pl.DataFrame(schema=schema)
        q = sa.select(*[runs.c[c] for c in cols]).where(runs.c.job == job, runs.c.status.in_([RunStatus.DONE, RunStatus.FAILED]))
        with self._tx(read=True) as conn:
            rows = conn.execute(q).all()
        return rows_frame(rows, schema)

    def newest_runs(self) -> dict[str, dict[str, Any]]:
        """Per job: `success` (finish time of its newest done run) and `last` (its newest finished run)."""
        if self.engine is None:
            return {}
        out: dict[str, dict[str, Any]] = {}
        finished = runs.c.status.in_([RunStatus.DONE, RunStatus.FAILED])
        with self._tx(read=True) as conn:
            q = sa.select(runs.c.job, sa.func.max(runs.c.finished_at)).where(runs.c.status == RunStatus.DONE)
            for job, when in conn.execute(q.group_by(runs.c.job)):
                out.setdefault(job, {})["success"] = when
            jobs = [r[0] for r in conn.execute(sa.select(runs.c.job).where(finished).distinct())]
            for job in jobs:
                row = conn.execute(sa.select(runs.c.id, runs.c.status, runs.c.finished_at, runs.c.seconds)
                                   .where(runs.c.job == job, finished)
                                   .order_by(runs.c.finished_at.desc(), runs.c.id.desc()).limit(1)).mappings().first()
                if row is not None:
                    out.setdefault(job, {})["last"] = dict(row)
        return out

def _frame(rows: Sequence[Any], columns: list[tuple[str, Any, Any]]) -> pl.DataFrame:
    """A frame built column by column from DBAPI row tuples."""
    import polars as pl

    values = list(zip(*rows, strict=True)) if rows else [() for _ in columns]
    return pl.DataFrame([pl.Series(name, vals, dtype=dtype)
                         for (name, _, dtype), vals in zip(columns, values, strict=True)])
