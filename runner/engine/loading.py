"""A workspace: a folder with `jobs/*.yaml` and `state/`. Loading and validating it.

`load_workspace` reads every job file and the workspace settings
(`jobs/_settings.yaml`, optional), validates each one and the graph between
them, resolves SQL steps statically, and either returns a `Workspace` or
raises `SpecProblems` with every problem of the run.
"""

from __future__ import annotations

import os
from pathlib import Path

from runner.core.validation import acyclic, graph_problems, sql_problems
from runner.core.workspace import JOB_SUFFIXES, Workspace
from runner.errors import Problem, SpecProblems, UsageError
from runner.model.loading import load_job, load_settings
from runner.model.settings import SETTINGS_FILE, WorkspaceSettings
from runner.model.spec import Job


def job_files(root: Path) -> list[Path]:
    folder = root / "jobs"
    if not folder.is_dir():
        return []
    return sorted(p for p in folder.iterdir() if p.suffix in JOB_SUFFIXES and p.is_file()
                  and not p.name.startswith(".") and p.name != SETTINGS_FILE)


def _display(path: Path) -> str:
    try:
        rel = os.path.relpath(path)
    except ValueError:
        return str(path)
    return rel if not rel.startswith(".." + os.sep + "..") else str(path)


def load_workspace(root: Path | str = ".", resolve_sql: bool = True, thorough: bool = True) -> Workspace:
    """Load and validate every job of the workspace at `root`.

    Raises SpecProblems listing every error (job files, graph, SQL) together.
    Warnings (advice that does not stop a run) are kept on the workspace.
    No data is read: `weir check`'s advice from input samples is
    `runner.engine.samples.batch_advice`, called by `api.check` only.
    `thorough=False` skips the checks that only `weir check` needs to be fast
    about (static SQL resolution): commands that run windows start
    sooner and would meet those problems as run failures. Outputs are checked
    by every load (two outputs aliasing each other must never run).
    """
    root = Path(root).resolve()
    files = job_files(root)
    if not (root / "jobs").is_dir():
        raise UsageError(f"{_display(root)} is not a weir workspace: it has no jobs/ folder (see `weir init`)")
    problems: list[Problem] = []
    jobs: dict[str, Job] = {}
    settings = WorkspaceSettings()
    settings_file = root / "jobs" / SETTINGS_FILE
    try:
        settings = load_settings(settings_file, display=_display(settings_file))
    except SpecProblems as exc:
        problems.extend(exc.problems)
    for file in files:
        try:
            job = load_job(file, display=_display(file))
        except SpecProblems as exc:
            problems.extend(exc.problems)
            continue
        if job.name in jobs:
            problems.append(Problem(_display(file), 1, 1, "", f"job {job.name!r} is defined twice ({jobs[job.name].file})"))
            continue
        jobs[job.name] = job
    problems.extend(graph_problems(jobs, root=root))
    warnings: list[Problem] = []
    schemas: dict | None = {} if thorough and resolve_sql else None
    # Every problem of a run is reported together; SQL is resolved in dependency
    # order, which needs a graph without cycles (cycles are reported above).
    if schemas is not None and acyclic(jobs):
        for p in sql_problems(jobs, schemas):
            (warnings if p.severity == "warning" else problems).append(p)
    if problems:
        raise SpecProblems(problems)
    return Workspace(root=root, jobs=jobs, warnings=warnings, resolved_schemas=schemas, settings=settings)


