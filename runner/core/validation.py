"""Problems of a workspace as a whole (pure): the job graph, the outputs, the SQL.

`graph_problems`: unknown producers, self-reads without a shift, cycles, and
`output_problems`: outputs that leave the workspace (judged on the text of the
path; writers check real paths again when they open, `runner.io.files`), land
on weir's own files, or alias each other. `sql_problems`: each SQL step
resolved statically against its inputs' schemas (`runner.core.sqlcheck`).
"""

from __future__ import annotations

import difflib
import os
from collections.abc import Mapping
from datetime import timedelta
from typing import TYPE_CHECKING

from runner.core.drawing import build_graph, find_cycles
from runner.core.graph import links, order_links, output_span
from runner.core.windows import Cadence, WindowSpan
from runner.errors import Problem
from runner.model.spec import Job, JobInput

if TYPE_CHECKING:
    import networkx as nx
    import polars as pl


def graph_problems(jobs: Mapping[str, Job], graph: nx.DiGraph | None = None,
                   root: str | os.PathLike[str] | None = None) -> list[Problem]:
    """Unknown producers, self-reads without a shift, cycles, and the outputs' problems
    (`output_problems`: leaving the workspace, weir's own files, aliases)."""
    problems: list[Problem] = []
    for name, job in sorted(jobs.items()):
        for input_name, source in job.spec.inputs.items():
            if not isinstance(source, JobInput):
                continue
            where = ("inputs", input_name, "job")
            if source.job == name:
                if source.lag is None and source.lookback is None:
                    problems.append(job.problem(
                        where, f"job {name!r} reads its own current window: a cycle {name} -> {name}; "
                        "add lag: 1 to read the previous window"))
            elif source.job not in jobs:
                close = difflib.get_close_matches(source.job, sorted(jobs), n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else f" (no job file jobs/{source.job}.yaml)"
                problems.append(job.problem(where, f"unknown producer job {source.job!r}{hint}"))
    try:
        order_links(links(jobs))
        cycles: list[list[str]] = []
    except ValueError:  # only now is the graph library needed: to list every cycle
        graph = graph if graph is not None else build_graph(jobs)
        cycles = find_cycles(graph)
    for cycle in cycles:
        path = " -> ".join([*cycle, cycle[0]])
        first, second = cycle[0], cycle[1] if len(cycle) > 1 else cycle[0]
        assert graph is not None  # built above when there is a cycle
        reader: str | None = graph.edges[first, second]["inputs"][0] if graph.has_edge(first, second) else None
        consumer = jobs[second]
        at: tuple[str, ...] = ("inputs", reader, "job") if reader else ()
        problems.append(consumer.problem(at, f"cycle {path}: jobs cannot read each other in a loop"))
    problems.extend(output_problems(jobs, root))
    return problems


OUTPUT_HORIZON = timedelta(days=400)  # open-ended jobs are compared up to the latest job start plus this


_DEFAULT_PORTS = {"postgresql": 5432, "mysql": 3306, "mariadb": 3306, "mssql": 1433, "oracle": 1521}  # common practice


def output_problems(jobs: Mapping[str, Job], root: str | os.PathLike[str] | None = None) -> list[Problem]:
    """Outputs that leave the workspace, land where weir keeps its own files, or alias each other.

    Outputs are compared by what they resolve to, not by how they are
    spelled: file templates by the normalized paths they render to over the
    job's windows (two windows of one job, or two jobs in any window), table
    outputs by database (a SQLite file by its normalized path, a server by
    backend, host, port and database) and by table name as the database
    compares names. `root` (the workspace) lets absolute SQLite paths inside
    it match relative ones.
    """
    import polars as pl

    from runner.core.paths import OWNED, OWNED_FOLDERS, database_file, output_paths, owner_of

    base = os.fspath(root) if root is not None else "."
    problems: list[Problem] = []
    horizon = max((Cadence.of(j.spec.window).start for j in jobs.values()), default=None)
    written: list[pl.DataFrame] = []  # job, i (a window's place in its span), path: each file a job writes
    spans: dict[str, WindowSpan] = {}
    tables: dict[tuple, tuple[str, str]] = {}
    databases: dict[str, tuple[str, str]] = {}  # SQLite files of table outputs, relative to the workspace
    for name, job in sorted(jobs.items()):
        out = job.spec.output
        if out.path is None:
            assert out.database is not None and out.table is not None
            file = database_file(base, out.database)
            if file is not None:
                relative = os.path.relpath(file, os.path.abspath(base))
                owner = owner_of(relative)
                if owner is not None:
                    problems.append(job.problem(("output", "database"), (
                        f"database {out.database!r} is {relative}, which weir keeps for itself ({owner}); "
                        "write the table to another database")))
                    continue
                databases.setdefault(relative, (name, out.database))
            identity = _table_identity(base, out.database, out.table)
            if identity in tables:
                other, spelled = tables[identity]
                problems.append(job.problem(("output", "table"), (
                    f"job {other!r} already writes this table (as {spelled!r}, in the same database); "
                    "each output belongs to one job")))
            else:
                tables[identity] = (name, out.table)
            continue
        field = ("output", "path")
        if _escapes(out.path):
            problems.append(job.problem(field, f"output path {out.path!r} leaves the workspace; "
                                               "use a relative path inside it"))
            continue
        try:
            cad = Cadence.of(job.spec.window)
            hi = cad.end if cad.end is not None else max(horizon or cad.start, cad.start) + OUTPUT_HORIZON
            span, paths = output_paths(out.path, output_span(cad, hi))
        except (ValueError, KeyError, IndexError, AttributeError):
            continue  # a template that does not render is reported where the job file is checked
        frame = pl.DataFrame({"path": paths}).with_row_index("i")
        path = pl.col("path")
        leaving = frame.filter(path.str.starts_with("/") | (path == "..") | path.str.starts_with("../"))
        if leaving.height:
            problems.append(job.problem(field, (
                f"output path {out.path!r} leaves the workspace (window {span[leaving['i'][0]].id} writes "
                f"{leaving['path'][0]}); use a relative path inside it")))
            continue
        owned = frame.filter(path.is_in(list(OWNED)) | pl.any_horizontal(
            [(path == f) | path.str.starts_with(f + "/") for f in OWNED_FOLDERS]))
        if owned.height:
            problems.append(job.problem(field, (
                f"output path {out.path!r} writes {owned['path'][0]}, which weir keeps for itself "
                f"({owner_of(owned['path'][0])}); write outputs elsewhere, e.g. under state/warehouse/")))
            continue
        twice = frame.filter(path.is_duplicated())
        if twice.height:
            rendered = twice["path"][0]
            a, b = (span[i].id for i in twice.filter(path == rendered)["i"].head(2).to_list())
            problems.append(job.problem(field, (
                f"windows {a} and {b} would both write {rendered}; add finer fields to the "
                "template (for hourly windows on fall-back days include the offset, %z)")))
            continue
        spans[name] = span
        written.append(frame.select(pl.lit(name).alias("job"), "i", "path"))
    if written:
        problems.extend(_shared_files(jobs, spans, pl.concat(written), databases))
    return problems


def _shared_files(jobs: Mapping[str, Job], spans: dict[str, WindowSpan], written: pl.DataFrame,
                  databases: dict[str, tuple[str, str]]) -> list[Problem]:
    """Files two jobs write (in any window, once per pair of jobs), and files that are the database
    of a table output."""
    import polars as pl

    problems = []
    shared = (written.group_by("path", maintain_order=True)
              .agg(pl.col("job"), pl.col("i"))
              .filter(pl.col("job").list.n_unique() > 1))
    reported: set[tuple[str, str]] = set()
    for path, owners, places in shared.iter_rows():
        seen = {job: spans[job][i].id for job, i in zip(owners, places, strict=True)}  # job -> its window
        names = sorted(seen)
        for a in names:
            for b in names[names.index(a) + 1:]:
                if (a, b) not in reported:
                    reported.add((a, b))
                    problems.append(jobs[b].problem(("output", "path"), (
                        f"job {a!r} already writes {path} (its window {seen[a]}; here window {seen[b]}); "
                        "each output belongs to one job")))
    hit = written.filter(pl.col("path").is_in(list(databases))).unique("path", keep="first", maintain_order=True)
    for job_name, i, path in hit.iter_rows():
        owner, url = databases[path]
        problems.append(jobs[job_name].problem(("output", "path"), (
            f"window {spans[job_name][i].id} would write {path}, the database of job {owner!r}'s table output ({url}); "
            "each output belongs to one job")))
    return problems


def _table_identity(base: str, url: str, table: str) -> tuple:
    """(database, table name as the database compares names) for a table output.

    The databases' identifier rules, from memory of their manuals: SQLite
    compares names ignoring the case of ASCII letters, quoted or not (checked
    in the tests with sqlite3); SQL Server (default collation) and
    MySQL/MariaDB (with lower_case_table_names, the default where file systems
    ignore case) ignore case, folded here to be safe; PostgreSQL keeps the case
    of the names SQLAlchemy quotes (any with a capital letter), so names are
    compared as written; Oracle stores an all-lower-case name SQLAlchemy leaves
    unquoted in upper case.
    """
    import sqlalchemy as sa

    from runner.core.paths import database_file

    try:
        parsed = sa.engine.make_url(url)
    except sa.exc.ArgumentError:
        return (url, table)
    backend = parsed.get_backend_name()
    if backend == "sqlite":
        file = database_file(base, url)
        where: tuple = ("sqlite", file if file is not None else url)  # in memory: each its own
        return (where, table.translate(_ASCII_LOWER))
    where = (backend, (parsed.host or "").lower(), parsed.port or _DEFAULT_PORTS.get(backend), parsed.database,
             tuple(sorted(parsed.query.items())))
    if backend in ("mysql", "mariadb", "mssql"):
        return (where, table.casefold())
    if backend == "oracle" and (table.islower() or table.isupper()):
        return (where, table.upper())
    return (where, table)


_ASCII_LOWER = str.maketrans("ABCDEFGHIJKLMNOPQRSTUVWXYZ", "abcdefghijklmnopqrstuvwxyz")


def _escapes(template: str) -> bool:
    static = template.split("{", 1)[0]
    if os.path.isabs(template) or os.path.isabs(static):
        return True
    return os.path.normpath(template).split(os.sep)[0] == ".."


def acyclic(jobs: dict[str, Job]) -> bool:
    try:
        order_links(links(jobs))
    except ValueError:
        return False
    return True


def sql_problems(jobs: dict[str, Job], schemas: dict) -> list[Problem]:
    """SQL findings of every job; fills `schemas` with each job's resolved output schema."""
    from runner.core.sqlcheck import resolve_job

    problems: list[Problem] = []
    for name in order_links(links(jobs)):
        job = jobs[name]
        resolution = resolve_job(job, schemas)
        schemas[name] = resolution.output
        for finding in resolution.findings:
            problems.append(job.problem(finding.path or ("steps", finding.step, "sql"), finding.message))
    return problems
