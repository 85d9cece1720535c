"""The job graph as a networkx DiGraph: its cycles, and drawings as text, Graphviz dot or Mermaid.

Only `weir check` (to list cycles) and `weir graph` need networkx; the
runtime path uses the plain maps of `runner.core.graph`.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING

from runner.core.graph import links, order_links
from runner.model.spec import Job, JobInput

if TYPE_CHECKING:
    import networkx as nx


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


def find_cycles(graph: nx.DiGraph) -> list[list[str]]:
    """Each elementary cycle once, rotated to start at its smallest name."""
    import networkx as nx

    out = []
    for cycle in nx.simple_cycles(graph):
        i = cycle.index(min(cycle))
        out.append(cycle[i:] + cycle[:i])
    return sorted(out)


def render(graph: nx.DiGraph, jobs: Mapping[str, Job], fmt: str = "text") -> str:
    """Draw the graph as indented text, Graphviz dot, or a Mermaid flowchart."""
    try:
        names = order_links(links(jobs))
    except ValueError:  # a cycle: no order, so by name
        names = sorted(graph)
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
