"""Before a window runs: its input files, its producers' states, its fingerprint, the code version.

`prepare` reads the file system and the ledger (never the data) and computes
the fingerprint a run would record now; `precheck`, `weir why` and the run
itself all start from it. The spec and code components of a job are computed
once per loaded workspace (`Workspace.memo`); `code_version` once per folder
and process.
"""

from __future__ import annotations

import subprocess
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

from runner.core import fingerprints as fp
from runner.core.states import State
from runner.core.windows import Window
from runner.core.workspace import Workspace, producer_windows
from runner.engine.context import RunContext
from runner.model.spec import FileInput


@lru_cache(maxsize=8)
def code_version(root: Path) -> str | None:
    """`git describe --always --dirty` of the workspace, when it is a git checkout."""
    try:
        out = subprocess.run(["git", "describe", "--always", "--dirty", "--tags"], cwd=root,
                             capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


@dataclass
class Producer:
    input: str
    job: str
    window: Window
    state: dict[str, Any] | None


@dataclass
class Prepared:
    """Everything known about a window before its steps run."""

    files: dict[str, Any]
    producers: list[Producer]
    parts: dict[str, fp.Part]
    fingerprint: str
    waiting: str | None
    ingested_ns: int | None


def spec_and_code(ws: Workspace, job: str) -> tuple[fp.Part, fp.Part]:
    """The spec and code components of `job` as its files were when the workspace was loaded.

    Computed once per loaded workspace (a long-running `weir serve` loads the
    workspace again before each tick, so edits are still seen).
    """
    from runner.engine.steps import code_pieces

    cache = ws.memo.setdefault("spec_and_code", {})
    if job not in cache:
        spec = ws.jobs[job].spec
        cache[job] = (fp.spec_part(spec), fp.code_part(code_pieces(spec, ws.root)))
    return cache[job]


def prepare(ctx: RunContext, job: str, window: Window, database_entries: list[dict[str, Any]] | None = None
            ) -> Prepared:
    """Find inputs and producer states; compute the fingerprint (reads the file system and ledger)."""
    from runner.io.readers import find_files

    ws = ctx.ws
    spec = ws.jobs[job].spec
    files = {}
    manifest: list[dict[str, Any]] = []
    waiting = None
    newest = None
    for name, source in spec.inputs.items():
        if isinstance(source, FileInput):
            found = find_files(ws.root, name, source, window)
            files[name] = found
            manifest.extend(found.manifest)
            if found.newest_mtime_ns is not None:
                newest = max(newest or 0, found.newest_mtime_ns)
            if not found.paths and source.required and waiting is None:
                waiting = f"input {name}: no files match {', '.join(found.patterns[:3])}"
    manifest.extend(database_entries or [])
    producers: list[Producer] = []
    by_job: dict[str, list[tuple[str, Window]]] = {}
    for name, pjob, w in producer_windows(ws, job, window):
        by_job.setdefault(pjob, []).append((name, w))
    upstream = []
    for pjob, items in by_job.items():
        states = ctx.ledger.state_rows(pjob, [w.key for _, w in items])
        not_done = []
        for name, w in items:
            state = states.get(w.key)
            producers.append(Producer(name, pjob, w, state))
            if state is None or state["state"] != State.DONE:
                not_done.append(w)
            else:
                upstream.append({"input": name, "job": pjob, "window": w.key, "digest": state["output_digest"]})
        if not_done and waiting is None:
            what = "itself" if pjob == job else pjob
            waiting = (f"waiting for {what}: {len(not_done)} of {len(items)} producer window(s) not done "
                       f"(first {not_done[0].id})")
    spec_p, code_p = spec_and_code(ws, job)
    parts = {"spec": spec_p, "code": code_p, "input": fp.input_part(manifest), "upstream": fp.upstream_part(upstream)}
    end_key = Window(window.end, window.end, window.tz).key
    return Prepared(files, producers, parts, fp.total(window.key, end_key, parts), waiting, newest)
