"""A workspace: a folder with `jobs/*.yaml` and `state/`. Loading and validating it.

`load_workspace` reads every job file and the workspace settings
(`jobs/_settings.yaml`, optional), validates each one and the graph between
them, resolves SQL steps statically, and either returns a `Workspace` or
raises `SpecProblems` with every problem of the run.
"""

from __future__ import annotations

import difflib
import os
from dataclasses import dataclass, field
from datetime import timedelta
from functools import cached_property
from pathlib import Path

from runner.core import graph as graphs
from runner.core.windows import Cadence
from runner.errors import Problem, SpecProblems, UsageError
from runner.model.spec import SETTINGS_FILE, Job, WorkspaceSettings, load_job, load_settings

JOB_SUFFIXES = (".yaml", ".yml")


@dataclass
class Workspace:
    """Validated jobs of one workspace, their graph and their cadences."""

    root: Path
    jobs: dict[str, Job]
    warnings: list[Problem] = field(default_factory=list)
    resolved_schemas: dict | None = None
    settings: WorkspaceSettings = field(default_factory=WorkspaceSettings)

    def time_allowed(self, name: str) -> timedelta:
        """How long one attempt at a window of `name` may run: the job's own limit, else the workspace's."""
        return self.job(name).spec.time_allowed or self.settings.time_allowed

    @cached_property
    def links(self) -> graphs.Links:
        """Each job's direct producers (plain maps: the runtime path needs nothing more)."""
        return graphs.links(self.jobs)

    @cached_property
    def graph(self):  # -> networkx.DiGraph, built on first use
        """The job graph as a networkx DiGraph (for drawings and analysis)."""
        return graphs.build_graph(self.jobs)

    def producers(self, name: str) -> set[str]:
        """The other jobs `name` reads directly."""
        return self.links[name]

    def upstream(self, names: list[str]) -> list[str]:
        """`names` plus every job they read, transitively, in dependency order."""
        wanted = graphs.reach(self.links, names, forward=False)
        return [n for n in self.order if n in wanted]

    def downstream(self, names: list[str]) -> list[str]:
        """`names` plus every job that reads them, transitively, in dependency order."""
        wanted = graphs.reach(self.links, names, forward=True)
        return [n for n in self.order if n in wanted]

    @property
    def output_schemas(self) -> dict:
        """Each job's output schema as resolved from its SQL (None where unknown); computed once."""
        if self.resolved_schemas is None:
            schemas: dict = {}
            _sql_problems(self.jobs, schemas)
            self.resolved_schemas = schemas
        return self.resolved_schemas

    @cached_property
    def order(self) -> list[str]:
        """Job names in dependency order."""
        return graphs.order_links(self.links)

    @cached_property
    def _cadences(self) -> dict[str, Cadence]:
        return {name: Cadence.of(job.spec.window) for name, job in self.jobs.items()}

    def cadence(self, name: str) -> Cadence:
        return self._cadences[self.job(name).name]

    def job(self, name: str) -> Job:
        """The job called `name`; a UsageError with a close match when there is none."""
        try:
            return self.jobs[name]
        except KeyError:
            close = difflib.get_close_matches(name, sorted(self.jobs), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            known = ", ".join(sorted(self.jobs)) or "none"
            raise UsageError(f"unknown job {name!r}{hint}; jobs here: {known}") from None

    def select(self, names: list[str] | tuple[str, ...], downstream: bool = False) -> list[str]:
        """Named jobs (all when empty), optionally with their consumers, in dependency order."""
        if not names:
            return list(self.order)
        for n in names:
            self.job(n)
        if downstream:
            return self.downstream(list(names))
        wanted = set(names)
        return [n for n in self.order if n in wanted]

    @property
    def state_dir(self) -> Path:
        return self.root / "state"

    def path(self, relative: str | os.PathLike[str]) -> Path:
        return self.root / relative


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
    `thorough=False` skips the checks that only `weir check` needs to be fast
    about (static SQL resolution, advice): commands that run windows start
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
    problems.extend(graphs.graph_problems(jobs, root=root))
    warnings: list[Problem] = []
    schemas: dict | None = {} if thorough and resolve_sql else None
    # Every problem of a run is reported together; SQL is resolved in dependency
    # order, which needs a graph without cycles (cycles are reported above).
    if thorough and resolve_sql and _acyclic(jobs):
        for p in _sql_problems(jobs, schemas):
            (warnings if p.severity == "warning" else problems).append(p)
    if problems:
        raise SpecProblems(problems)
    if thorough:
        from runner.core.cardinality import batch_advice

        warnings.extend(batch_advice(root, jobs))
    return Workspace(root=root, jobs=jobs, warnings=warnings, resolved_schemas=schemas, settings=settings)


def _acyclic(jobs: dict[str, Job]) -> bool:
    try:
        graphs.order_links(graphs.links(jobs))
    except ValueError:
        return False
    return True


def _sql_problems(jobs: dict[str, Job], schemas: dict) -> list[Problem]:
    """SQL findings of every job; fills `schemas` with each job's resolved output schema."""
    from runner.core.sqlcheck import resolve_job

    problems: list[Problem] = []
    for name in graphs.order_links(graphs.links(jobs)):
        job = jobs[name]
        resolution = resolve_job(job, schemas)
        schemas[name] = resolution.output
        for finding in resolution.findings:
            problems.append(job.problem(finding.path or ("steps", finding.step, "sql"), finding.message))
    return problems
