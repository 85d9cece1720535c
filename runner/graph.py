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
from typing import TYPE_CHECKING

from runner.errors import Problem
from runner.spec import Job, JobInput

if TYPE_CHECKING:
    import networkx as nx

    from runner.windows import Cadence, Window

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


def graph_problems(jobs: Mapping[str, Job], graph: nx.DiGraph | None = None) -> list[Problem]:
    """Unknown producers, self-reads without a shift, cycles, shared outputs."""
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
    seen: dict[str, str] = {}
    for name, job in sorted(jobs.items()):
        out = job.spec.output
        target = (
            os.path.normpath(out.path) if out.path is not None else f"{out.database} table {out.table}"
        )
        field = ("output", "path") if out.path is not None else ("output", "table")
        if target in seen:
            problems.append(job.problem(
                field, f"job {seen[target]!r} already writes {target!r}; each output belongs to one job"))
        else:
            seen[target] = name
        if out.path is not None and (_escapes(out.path) or _rendered_escapes(out.path, job)):
            problems.append(job.problem(field, f"output path {out.path!r} leaves the workspace; use a relative path inside it"))
    return problems


def _escapes(template: str) -> bool:
    static = template.split("{", 1)[0]
    if os.path.isabs(template) or os.path.isabs(static):
        return True
    return os.path.normpath(template).split(os.sep)[0] == ".."


def _rendered_escapes(template: str, job: Job) -> bool:
    """The template rendered for the job's first window leaves the workspace (placeholders may hold `..`)."""
    from runner.paths import render
    from runner.windows import Cadence

    try:
        first = Cadence.of(job.spec.window).first()
        path = render(template, first) if first is not None else template
    except (ValueError, KeyError, IndexError):
        return False
    return os.path.isabs(path) or os.path.normpath(path).split(os.sep)[0] == ".."


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
