"""The job graph: edges, dependency order, drawings, and which producer windows a consumer reads."""

from __future__ import annotations

import graphlib
import re
import textwrap
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from runner.core.drawing import render
from runner.core.graph import links, order_links, upstream_windows
from runner.engine.loading import load_workspace
from runner.errors import SpecProblems
from runner.model.loading import load_job
from runner.model.spec import JobInput

ROOT = Path(__file__).resolve().parent.parent


def write_jobs(root: Path, jobs: dict[str, str]) -> Path:
    (root / "jobs").mkdir(parents=True, exist_ok=True)
    for name, text in jobs.items():
        (root / "jobs" / f"{name}.yaml").write_text(textwrap.dedent(text))
    return root


def simple(name: str, reads: dict[str, str] | None = None, every: str = "1h", tz: str = "Europe/Lisbon",
           start: str = "2026-01-01") -> str:
    inputs = "".join(f"  {alias}: {spec}\n" for alias, spec in (reads or {}).items())
    first = next(iter(reads), None) if reads else None
    sql = f"SELECT * FROM {first}" if first else "SELECT 1 AS rides"
    return (f"window: {{every: {every}, start: {start}, timezone: {tz}}}\n"
            + (f"inputs:\n{inputs}" if inputs else "")
            + f"steps: [{{sql: {sql}}}]\n"
            + f'output: {{path: "state/out/{name}/{{start:%Y-%m-%dT%H%z}}.parquet"}}\n')


@pytest.fixture
def bikes(tmp_path):
    """A small bike-share graph: hourly rides feed daily totals and a weekly report."""
    return load_workspace(write_jobs(tmp_path, {
        "rides_hourly": simple("rides_hourly"),
        "rides_daily": simple("rides_daily", {"hourly": "{job: rides_hourly}"}, every="1d"),
        "zone_weekly": simple("zone_weekly", {"daily": "{job: rides_daily}", "hourly": "{job: rides_hourly}"},
                              every="1w", start="2026-01-05"),
        "dock_fleet": simple("dock_fleet", {"before": "{job: dock_fleet, lag: 1}"}, every="1d"),
        "alerts": simple("alerts", {"weekly": "{job: zone_weekly}"}),
    }), resolve_sql=False)


def test_edges_run_from_producer_to_consumer_and_carry_the_input_names(bikes):
    graph = bikes.graph
    assert sorted(graph.edges) == [("rides_daily", "zone_weekly"), ("rides_hourly", "rides_daily"),
                                   ("rides_hourly", "zone_weekly"), ("zone_weekly", "alerts")]
    assert graph.edges["rides_hourly", "rides_daily"]["inputs"] == ["hourly"]
    assert not graph.has_edge("dock_fleet", "dock_fleet")  # reading earlier windows is no edge


def test_order_is_a_topological_order_with_ties_broken_by_name(bikes):
    names = bikes.order
    # the standard library's graphlib.TopologicalSorter as an independent check
    # that such an order exists (it raises CycleError otherwise)
    sorter = graphlib.TopologicalSorter({n: set(bikes.graph.predecessors(n)) for n in bikes.graph})
    assert set(sorter.static_order()) == set(names)
    for a, b in bikes.graph.edges:
        assert names.index(a) < names.index(b)
    # among jobs that are ready at the same time, the alphabetically first goes first
    assert names == ["dock_fleet", "rides_hourly", "rides_daily", "zone_weekly", "alerts"]


def test_order_does_not_depend_on_the_order_files_were_read(bikes):
    jobs = dict(reversed(list(bikes.jobs.items())))
    assert order_links(links(jobs)) == bikes.order


def test_downstream_adds_every_consumer_transitively_in_order(bikes):
    assert bikes.downstream(["rides_hourly"]) == ["rides_hourly", "rides_daily", "zone_weekly", "alerts"]
    assert bikes.downstream(["dock_fleet"]) == ["dock_fleet"]
    assert bikes.select(["alerts", "rides_hourly"]) == ["rides_hourly", "alerts"]


def test_text_drawing_lists_each_job_with_what_it_reads(bikes):
    text = render(bikes.graph, bikes.jobs, "text")
    lines = text.splitlines()
    assert [ln.split()[0] for ln in lines] == bikes.order
    assert "rides_daily  <- rides_hourly (hourly)" in lines
    assert "zone_weekly  <- rides_daily (daily); rides_hourly (hourly)" in lines
    assert "dock_fleet  <- itself, earlier windows (before)" in lines
    assert "rides_hourly" in lines  # reads no job


def test_dot_drawing_is_a_well_formed_digraph_with_every_edge(bikes):
    dot = render(bikes.graph, bikes.jobs, "dot")
    # Graphviz DOT grammar (graphviz.org, "The DOT Language"): digraph ID { stmt_list }
    assert dot.startswith("digraph weir {\n") and dot.rstrip().endswith("}")
    assert dot.count("{") == dot.count("}")
    edges = set(re.findall(r'^\s*"(\w+)" -> "(\w+)" \[label="([^"]*)"', dot, re.M))
    assert {(a, b) for a, b, _ in edges} == set(bikes.graph.edges) | {("dock_fleet", "dock_fleet")}
    assert ("rides_hourly", "rides_daily", "hourly") in edges
    assert re.search(r'"dock_fleet" -> "dock_fleet" \[[^\]]*style=dashed', dot)
    nodes = set(re.findall(r'^\s*"(\w+)";$', dot, re.M))
    assert nodes == set(bikes.jobs)


def test_mermaid_drawing_is_a_flowchart_with_every_edge(bikes):
    text = render(bikes.graph, bikes.jobs, "mermaid")
    lines = text.splitlines()
    # Mermaid flowchart syntax (mermaid.js.org, "Flowcharts"): header, nodes, A -->|label| B
    assert lines[0] == "flowchart LR"
    edges = {(a, b) for a, b in re.findall(r"^\s*(\w+) -->\|[^|]*\| (\w+)$", text, re.M)}
    assert edges == set(bikes.graph.edges)
    assert re.search(r"^\s*dock_fleet -\.->\|before, earlier windows\| dock_fleet$", text, re.M)
    assert {m for m in re.findall(r"^\s*(\w+)\[\1\]$", text, re.M)} == set(bikes.jobs)


# ---------------------------------------------------------------- producer windows a consumer reads


def _cadences(bikes, consumer: str, producer: str):
    return bikes.cadence(consumer), bikes.cadence(producer)


def _local_midnight(tz: ZoneInfo, day: date) -> datetime:
    return datetime.combine(day, time(), tz).astimezone(UTC)  # zoneinfo; midnight exists in Lisbon


@pytest.mark.parametrize(("day", "hours"), [(date(2026, 3, 29), 23), (date(2026, 10, 25), 25),
                                            (date(2026, 6, 1), 24)])
def test_a_daily_consumer_reads_every_hour_of_its_local_day(bikes, day, hours):
    daily, hourly = _cadences(bikes, "rides_daily", "rides_hourly")
    tz = ZoneInfo("Europe/Lisbon")
    window = daily.window(day.isoformat())
    source = bikes.jobs["rides_daily"].spec.inputs["hourly"]
    read = upstream_windows(daily, window, hourly, source, same_job=False)
    # IANA database via zoneinfo: the local day's length in hours (memory: 23 / 25 / 24)
    span = _local_midnight(tz, day + timedelta(days=1)) - _local_midnight(tz, day)
    assert len(read) == span / timedelta(hours=1) == hours
    assert read[0].start == window.start and read[-1].end == window.end


def test_lag_reads_the_previous_window_and_nothing_before_the_first(bikes):
    cad = bikes.cadence("dock_fleet")
    source = bikes.jobs["dock_fleet"].spec.inputs["before"]
    first = cad.first()
    assert upstream_windows(cad, first, cad, source, same_job=True) == []
    second = cad.shift(first, -1)
    assert upstream_windows(cad, second, cad, source, same_job=True) == [first]


def test_lookback_reads_every_producer_window_overlapping_the_range(tmp_path):
    ws = load_workspace(write_jobs(tmp_path, {
        "rides_daily": simple("rides_daily", every="1d"),
        "rides_rolling": simple("rides_rolling", {"days": "{job: rides_daily, lookback: 7d}"}, every="1d"),
    }), resolve_sql=False)
    cad = ws.cadence("rides_rolling")
    window = cad.window("2026-02-10")
    read = upstream_windows(cad, window, ws.cadence("rides_daily"), ws.jobs["rides_rolling"].spec.inputs["days"],
                            same_job=False)
    # [start - 7 days, end): the 7 days before plus the day itself (calendar arithmetic)
    assert [w.start.date() for w in read] == [date(2026, 2, 3) + timedelta(days=k) for k in range(8)]


def test_job_input_model_refuses_lag_with_lookback(tmp_path):
    file = tmp_path / "rides_daily.yaml"
    file.write_text(simple("rides_daily", {"x": "{job: rides_hourly, lag: 1, lookback: 2d}"}))
    with pytest.raises(SpecProblems, match="either lag or lookback"):
        load_job(file)
    assert JobInput(job="rides_hourly", lag=2).lag == 2


def test_the_example_workspace_graph_is_the_documented_one():
    ws = load_workspace(ROOT, resolve_sql=False)
    assert ("rides_hourly", "rides_daily") in ws.graph.edges
    assert ws.order.index("rides_hourly") < ws.order.index("rides_daily")
