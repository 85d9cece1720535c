"""The runtime's plain-map graph helpers agree with networkx (the reference) on random DAGs."""

from __future__ import annotations

import networkx as nx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runner.core.graph import order_links, reach

NAMES = [f"job_{c}" for c in "abcdefghij"]


@st.composite
def dags(draw):
    n = draw(st.integers(1, len(NAMES)))
    names = draw(st.permutations(NAMES))[:n]
    producers: dict[str, set[str]] = {name: set() for name in names}
    # edges only from earlier to later in a random permutation: acyclic by construction
    for i, consumer in enumerate(names):
        for producer in names[:i]:
            if draw(st.booleans()):
                producers[consumer].add(producer)
    return producers


def _graph(producers):
    g = nx.DiGraph()
    g.add_nodes_from(producers)
    g.add_edges_from((p, c) for c, ps in producers.items() for p in ps)
    return g


@settings(max_examples=150, deadline=None)
@given(dags())
def test_dependency_order_equals_networkx_lexicographic_topological_sort(producers):
    # networkx.lexicographical_topological_sort as the independent reference
    assert order_links(producers) == list(nx.lexicographical_topological_sort(_graph(producers)))


@settings(max_examples=150, deadline=None)
@given(dags(), st.data())
def test_reach_equals_networkx_ancestors_and_descendants(producers, data):
    start = data.draw(st.sampled_from(sorted(producers)))
    g = _graph(producers)
    assert reach(producers, [start], forward=True) == {start} | nx.descendants(g, start)
    assert reach(producers, [start], forward=False) == {start} | nx.ancestors(g, start)


def test_a_cycle_is_refused():
    with pytest.raises(ValueError):
        order_links({"a": {"b"}, "b": {"a"}})
