"""The shell around planning: read the ledger and the file system once, then assess.

`Survey` gathers what the pure planner needs (ledger snapshot, current spec and
code hashes, an input probe backed by one file listing per input) and offers
the views the commands show: plan, stale ranges, impact.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import datetime
from typing import TYPE_CHECKING, Any

from runner.core import fingerprints as fp
from runner.core.assessment import Assessment, Probe, Snapshot, assess
from runner.core.windows import Window
from runner.core.workspace import Workspace
from runner.engine.prepare import spec_and_code
from runner.io.files import FileIndex
from runner.io.ledger.store import Ledger
from runner.model.spec import DatabaseInput, FileInput

if TYPE_CHECKING:
    import polars as pl


class _Arriving(Mapping[str, Any]):
    """Job -> state frame, each read by a background thread in dependency order.

    The planner asks for jobs in that same order, so while it assesses one job
    the next job's rows are being read (SQLite and polars both let go of the
    interpreter lock for their heavy work, so the two overlap on two cores).
    """

    def __init__(self, futures: dict[str, Future]):
        self._futures = futures

    def __getitem__(self, job: str) -> Any:
        return self._futures[job].result()

    def __iter__(self) -> Iterator[str]:
        return iter(self._futures)

    def __len__(self) -> int:
        return len(self._futures)


def snapshot(ws: Workspace, ledger: Ledger, jobs: list[str], parts: dict[str, tuple[str, str]],
             at: datetime, recheck_all: bool = False, extras: bool = False) -> Snapshot:
    """One query per job for what planning needs of its window states, one for the live claims.

    The per-job reads run on a background thread, in `jobs` order; the returned
    snapshot's `states` wait for each job's read when it is first looked at.
    """
    from runner.model.spec import JobInput

    read = {s.job for j in ws.jobs.values() for s in j.spec.inputs.values() if isinstance(s, JobInput)}

    def states_of(job: str) -> Any:
        spec = ws.jobs[job].spec
        input_from = None
        if not recheck_all:
            cad = ws.cadence(job)
            first = cad.window_at(at - spec.recheck)
            input_from = (first.key if first is not None else
                          Window(at - spec.recheck, at - spec.recheck, cad.tz).key)
        return ledger.plan_states(
            job, parts[job][0], parts[job][1], input_from=input_from,
            upstream=any(isinstance(s, JobInput) for s in spec.inputs.values()),
            digests=job in read or extras, ingested=spec.late_after is not None, extras=extras)

    claims = set(ledger.claimed().keys())
    reader = ThreadPoolExecutor(max_workers=1, thread_name_prefix="weir-ledger-read")
    futures = {job: reader.submit(states_of, job) for job in jobs}
    reader.shutdown(wait=False)  # the thread ends once the queued reads are done
    return Snapshot(states=_Arriving(futures), claims=claims)


@dataclass
class InputProber:
    """Probes windows' inputs from one listing per file input (built on first use)."""

    ws: Workspace
    indexes: dict[tuple[str, str], FileIndex] = field(default_factory=dict)
    as_columns: bool = False  # `many` returns a frame (in_hash, in_newest, in_waiting) instead of Probes

    def __call__(self, job: str, window: Window) -> Probe:
        from runner.io.readers import find_files

        spec = self.ws.jobs[job].spec
        entries: list[dict[str, Any]] = []
        newest = None
        waiting = None
        tables = False
        for name, source in spec.inputs.items():
            if isinstance(source, DatabaseInput):
                tables = True  # its rows are read by a run only: the input hash is unknown here
                continue
            if not isinstance(source, FileInput):
                continue
            key = (job, name)
            if key not in self.indexes:
                self.indexes[key] = FileIndex.build(self.ws.root, source.files)
            found = find_files(self.ws.root, name, source, window, self.indexes[key])
            entries.extend(found.manifest)
            if found.newest_mtime_ns is not None:
                newest = max(newest or 0, found.newest_mtime_ns)
            if not found.paths and source.required and waiting is None:
                waiting = f"input {name}: no files match {', '.join(found.patterns[:2])}"
        return Probe(None if tables else fp.input_part(entries).hash, newest, waiting)

    def many(self, job: str, tz: Any, starts_us: list[int], ends_us: list[int]) -> list[Probe] | pl.DataFrame:
        """Probes for many windows of one job (given as UTC epoch microseconds): each distinct
        set of rendered patterns is looked up once."""
        import polars as pl

        from runner.core.paths import expand, render_many
        from runner.io.readers import files_for_patterns
        from runner.model.timeutil import from_us

        def window(i: int) -> Window:
            return Window(from_us(starts_us[i]), from_us(ends_us[i]), tz)

        spec = self.ws.jobs[job].spec
        if any(isinstance(s, DatabaseInput) for s in spec.inputs.values()) or not starts_us:
            return [self(job, window(i)) for i in range(len(starts_us))]
        files = [(n, s) for n, s in spec.inputs.items() if isinstance(s, FileInput)]
        starts = pl.Series(starts_us, dtype=pl.Int64)
        ends = pl.Series(ends_us, dtype=pl.Int64)
        # one text key per window: its rendered patterns, input by input (\x1f and \x1e never
        # occur in a path), so that windows sharing their files are looked up once
        per_input = []
        for _, source in files:
            rendered = render_many(source.files, starts, ends, tz.key)
            if rendered is None:
                rendered = pl.Series([chr(31).join(expand(source.files, window(i))) for i in range(len(starts_us))],
                                     dtype=pl.String)
            per_input.append(rendered)
        keys = (pl.DataFrame({str(i): r for i, r in enumerate(per_input)})
                .select(pl.concat_str(pl.all(), separator=chr(30)))
                .to_series())
        unique = keys.unique(maintain_order=True).to_list()
        looked_up: dict[str, Probe] = {}
        for key in unique:
            entries: list[dict[str, Any]] = []
            newest = None
            waiting = None
            for (name, source), patterns in zip(files, key.split(chr(30)), strict=True):
                index_key = (job, name)
                if index_key not in self.indexes:
                    self.indexes[index_key] = FileIndex.build(self.ws.root, source.files)
                fs = files_for_patterns(self.ws.root, name, source, patterns.split(chr(31)), self.indexes[index_key])
                entries.extend(fs.manifest)
                if fs.newest_mtime_ns is not None:
                    newest = max(newest or 0, fs.newest_mtime_ns)
                if not fs.paths and source.required and waiting is None:
                    waiting = f"input {name}: no files match {', '.join(fs.patterns[:2])}"
            looked_up[key] = Probe(fp.input_part(entries).hash, newest, waiting)
        if self.as_columns:
            table = pl.DataFrame({
                "key": list(looked_up), "in_hash": [p.input_hash for p in looked_up.values()],
                "in_newest": [p.newest_mtime_ns for p in looked_up.values()],
                "in_waiting": [p.waiting for p in looked_up.values()]},
                schema={"key": pl.String, "in_hash": pl.String, "in_newest": pl.Int64, "in_waiting": pl.String})
            return pl.DataFrame({"key": keys}).join(table, on="key", how="left", maintain_order="left").drop("key")
        return [looked_up[k] for k in keys.to_list()]


def closure(ws: Workspace, jobs: list[str]) -> list[str]:
    """`jobs` (all when empty) plus their producers, transitively, in dependency order."""
    return ws.upstream(ws.select(jobs))


def survey(ws: Workspace, ledger: Ledger, at: datetime, jobs: list[str] | None = None,
           recheck_all: bool = False, extras: bool = False) -> Assessment:
    """Assessed frames of `jobs` (all when empty), reading the ledger and inputs once.

    `extras` also brings each window's run id, output, digest and duration (for the report).
    """
    names = closure(ws, jobs or [])
    parts = {}
    for name in names:
        spec_p, code_p = spec_and_code(ws, name)
        parts[name] = (spec_p.hash, code_p.hash)
    snap = snapshot(ws, ledger, names, parts, at, recheck_all, extras)
    return assess(ws, at, snap, InputProber(ws, as_columns=True), jobs or None, recheck_all)
