"""The job graph: which job reads which, its problems, its order and drawings.

Pure functions over loaded jobs. Edges run producer -> consumer and come from
`inputs: {name: {job: PRODUCER}}`. A job reading its own earlier windows
(`lag:` or `lookback:` on itself) is a carry-forward, not a cycle.
"""

from __future__ import annotations

import difflib
import heapq
import os
from collections.abc import Mapping
from datetime import datetime, timedelta
from typing import TYPE_CHECKING

from runner.core.windows import Cadence
from runner.errors import Problem
from runner.model.spec import Job, JobInput

if TYPE_CHECKING:
    import networkx as nx
    import polars as pl

    from runner.core.windows import Window, WindowSpan

Links = dict[str, set[str]]  # job -> the other jobs it reads (its direct producers)


def links(jobs: Mapping[str, Job]) -> Links:
    """Each job's direct producers among `jobs` (a job's reads of itself are no link).

    The runtime path uses these plain maps; the networkx graph is built only
    for `weir check` and drawings, so that commands which run windows do not
    pay for importing networkx.
    """
    out: Links = {name: set() for name in jobs}
    for name, job in jobs.items():
        for source in job.spec.inputs.values():
            if isinstance(source, JobInput) and source.job in jobs and source.job != name:
                out[name].add(source.job)
    return out


def order_links(producers: Links) -> list[str]:
    """Dependency order, ties broken by name (the same order as `order` on the graph).

    Raises ValueError on a cycle.
    """
    waiting = {n: len(p) for n, p in producers.items()}
    consumers: dict[str, list[str]] = {n: [] for n in producers}
    for n, ps in producers.items():
        for p in ps:
            consumers[p].append(n)
    ready = [n for n, k in waiting.items() if k == 0]
    heapq.heapify(ready)
    out = []
    while ready:
        n = heapq.heappop(ready)
        out.append(n)
        for c in consumers[n]:
            waiting[c] -= 1
            if waiting[c] == 0:
                heapq.heappush(ready, c)
    if len(out) != len(producers):
        raise ValueError("the job graph has a cycle")
    return out


def reach(producers: Links, names: list[str], forward: bool) -> set[str]:
    """`names` and every job they feed (forward) or that feeds them (backward), transitively."""
    nxt: dict[str, set[str]] = {n: set() for n in producers}
    if forward:
        for n, ps in producers.items():
            for p in ps:
                nxt[p].add(n)
    else:
        nxt = {n: set(ps) for n, ps in producers.items()}
    seen = set(names)
    todo = list(names)
    while todo:
        for m in nxt.get(todo.pop(), ()):
            if m not in seen:
                seen.add(m)
                todo.append(m)
    return seen


def build_graph(jobs: Mapping[str, Job]) -> nx.DiGraph:
    """Job DAG (or not, see `graph_problems`): nodes are job names."""
    import networkx as nx

    graph = nx.DiGraph()
    for name in sorted(jobs):
        graph.add_node(name)
    for name, job in sorted(jobs.items()):
        for input_name, source in job.spec.inputs.items():
            if isinstance(source, JobInput) and source.job in jobs and source.job != name:
                if graph.has_edge(source.job, name):
                    graph.edges[source.job, name]["inputs"].append(input_name)
                else:
                    graph.add_edge(source.job, name, inputs=[input_name])
    return graph


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
        cycles = _cycles(graph)
    for cycle in cycles:
        path = " -> ".join([*cycle, cycle[0]])
        first, second = cycle[0], cycle[1] if len(cycle) > 1 else cycle[0]
        input_name = graph.edges[first, second]["inputs"][0] if graph.has_edge(first, second) else None
        consumer = jobs[second]
        where = ("inputs", input_name, "job") if input_name else ()
        problems.append(consumer.problem(where, f"cycle {path}: jobs cannot read each other in a loop"))
    problems.extend(output_problems(jobs, root))
    return problems


# ---------------------------------------------------------------- outputs

OUTPUT_HORIZON = timedelta(days=400)  # open-ended jobs are compared up to the latest job start plus this
MOST_WINDOWS = 50_000  # windows compared per job (the latest ones); fewer for cron cadences,
MOST_CRON_WINDOWS = 1_000  # whose fires are found one by one
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


def output_span(cad: Cadence, hi: datetime) -> WindowSpan:
    """The windows of `cad` starting before `hi`: the latest MOST_WINDOWS of them (MOST_CRON_WINDOWS
    for cron cadences, whose fires are found one by one)."""
    first = cad.first()
    if cad.end is not None:
        hi = min(hi, cad.end)
    if first is None or hi <= cad.start:
        return cad.span(cad.start, cad.start)
    most = MOST_CRON_WINDOWS if cad.kind == "cron" else MOST_WINDOWS
    try:
        lo = max(cad.start, hi - first.length * most)
    except OverflowError:  # long windows: fewer than `most` of them since year 1
        lo = cad.start
    span = cad.span(lo, hi)
    if len(span) > most:
        from runner.core.windows import WindowSpan

        span = WindowSpan(span.starts_us.tail(most), span.ends_us.tail(most), span.tz)
    return span


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


def _cycles(graph: nx.DiGraph) -> list[list[str]]:
    """Each elementary cycle once, rotated to start at its smallest name."""
    import networkx as nx

    out = []
    for cycle in nx.simple_cycles(graph):
        i = cycle.index(min(cycle))
        out.append(cycle[i:] + cycle[:i])
    return sorted(out)


def order(graph: nx.DiGraph) -> list[str]:
    """Jobs in dependency order, ties broken by name (stable across runs)."""
    import networkx as nx

    return list(nx.lexicographical_topological_sort(graph))


def downstream(graph: nx.DiGraph, names: list[str]) -> list[str]:
    """`names` plus every job that reads them, transitively, in dependency order."""
    import networkx as nx

    wanted = set(names)
    for name in names:
        wanted |= nx.descendants(graph, name)
    return [n for n in order(graph) if n in wanted]


def upstream_windows(consumer: Cadence, window: Window, producer: Cadence, source: JobInput,
                     same_job: bool) -> list[Window]:
    """The producer windows a consumer window reads through one job input.

    Plain: every producer window overlapping the consumer window. `lag: N`:
    those overlapping the consumer's N-th earlier window (none before the
    first). `lookback: D`: those overlapping `[start - D, end)`; on the job
    itself only windows strictly before this one.
    """
    if source.lag is not None:
        earlier = consumer.shift(window, source.lag)
        if earlier is None:
            return []
        lo, hi = earlier.start, earlier.end
    elif source.lookback is not None:
        lo, hi = window.start - source.lookback, window.end
        if same_job:
            hi = window.start
    else:
        lo, hi = window.start, window.end
    if hi <= lo:
        return []
    if lo < producer.start:
        lo = producer.start
    return list(producer.overlapping(lo, hi)) if hi > lo else []


def render(graph: nx.DiGraph, jobs: Mapping[str, Job], fmt: str = "text") -> str:
    """Draw the graph as indented text, Graphviz dot, or a Mermaid flowchart."""
    import networkx as nx

    names = order(graph) if nx.is_directed_acyclic_graph(graph) else sorted(graph)
    selfs = {
        n: [i for i, s in jobs[n].spec.inputs.items() if isinstance(s, JobInput) and s.job == n]
        for n in names if n in jobs
    }
    if fmt == "dot":
        lines = ["digraph weir {", "  rankdir=LR;", "  node [shape=box];"]
        for n in names:
            lines.append(f'  "{n}";')
        for a, b, data in sorted(graph.edges(data=True)):
            lines.append(f'  "{a}" -> "{b}" [label="{", ".join(data["inputs"])}"];')
        for n, inputs in selfs.items():
            if inputs:
                lines.append(f'  "{n}" -> "{n}" [label="{", ".join(inputs)} (earlier windows)", style=dashed];')
        lines.append("}")
        return "\n".join(lines) + "\n"
    if fmt == "mermaid":
        lines = ["flowchart LR"]
        for n in names:
            lines.append(f"  {n}[{n}]")
        for a, b, data in sorted(graph.edges(data=True)):
            lines.append(f"  {a} -->|{', '.join(data['inputs'])}| {b}")
        for n, inputs in selfs.items():
            if inputs:
                lines.append(f"  {n} -.->|{', '.join(inputs)}, earlier windows| {n}")
        return "\n".join(lines) + "\n"
    lines = []
    for n in names:
        preds = sorted(graph.predecessors(n))
        reads = [f"{p} ({', '.join(graph.edges[p, n]['inputs'])})" for p in preds]
        if selfs.get(n):
            reads.append(f"itself, earlier windows ({', '.join(selfs[n])})")
        lines.append(n + (f"  <- {'; '.join(reads)}" if reads else ""))
    return "\n".join(lines) + "\n"
