"""A loaded workspace: its validated jobs, their links and order, their cadences (pure).

`runner.engine.loading.load_workspace` reads the job files and builds one;
everything after loading (planning, running, reporting) takes it.
"""

from __future__ import annotations

import difflib
import os
from dataclasses import dataclass, field
from datetime import timedelta
from functools import cached_property
from pathlib import Path
from typing import Any

from runner.core import graph as graphs
from runner.core.graph import upstream_windows
from runner.core.validation import sql_problems
from runner.core.windows import Cadence, Window
from runner.errors import Problem, UsageError
from runner.model.settings import WorkspaceSettings
from runner.model.spec import Job, JobInput

JOB_SUFFIXES = (".yaml", ".yml")


@dataclass
class Workspace:
    """Validated jobs of one workspace, their graph and their cadences."""

    root: Path
    jobs: dict[str, Job]
    warnings: list[Problem] = field(default_factory=list)
    resolved_schemas: dict | None = None
    settings: WorkspaceSettings = field(default_factory=WorkspaceSettings)
    memo: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)  # values computed once per load

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
        from runner.core.drawing import build_graph

        return build_graph(self.jobs)

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
            sql_problems(self.jobs, schemas)
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

    def path(self, relative: str | os.PathLike[str]) -> Path:
        return self.root / relative


def producer_windows(ws: Workspace, job: str, window: Window) -> list[tuple[str, str, Window]]:
    """(input, producer job, producer window) for every job input of a window."""
    out = []
    cad = ws.cadence(job)
    for name, source in ws.jobs[job].spec.inputs.items():
        if isinstance(source, JobInput):
            pcad = ws.cadence(source.job)
            for w in upstream_windows(cad, window, pcad, source, same_job=source.job == job):
                out.append((name, source.job, w))
    return out
