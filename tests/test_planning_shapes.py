"""Job shapes that once crashed planning for a whole workspace (hardening issue, item 1).

A job with two file inputs, a lookup file without placeholders, or a template
coarser than the cadence must plan like any other; and a job whose planning
fails for any reason is reported on its own while every other job is planned
and run. Expected outputs are written by hand from the job files below.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

DAILY = "window: {every: 1d, start: 2026-01-01, end: 2026-01-03}\n"


def _land(root: Path, *names: str) -> None:
    for name in names:
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("a\n1\n")


@pytest.mark.parametrize("inputs, files", [
    pytest.param('{x: {files: "in/{start:%Y-%m-%d}.csv"}, y: {files: "in/{start:%Y-%m-%d}.csv"}}',
                 ["in/2026-01-01.csv", "in/2026-01-02.csv"], id="two-file-inputs"),
    pytest.param('{x: {files: "in/{start:%Y-%m-%d}.csv"}, y: {files: "ref/lookup.csv"}}',
                 ["in/2026-01-01.csv", "in/2026-01-02.csv", "ref/lookup.csv"], id="lookup-file-without-placeholder"),
    pytest.param('{x: {files: "ref/{start:%Y-%m}.csv"}}',
                 ["ref/2026-01.csv"], id="monthly-template-under-a-daily-job"),
])
def test_plan_tick_stale_and_impact_handle_common_input_shapes(make_workspace, weir, inputs, files):
    """Item 1: two file inputs, a lookup file and a coarser template crashed plan/tick/stale/impact (exit 70)."""
    root = make_workspace({"shape": DAILY + f"inputs: {inputs}\n"
                                           "steps: [{sql: SELECT COUNT(*) AS n FROM x}]\n"
                                           "output: {path: \"state/out/{start:%Y-%m-%d}.csv\"}\n"})
    _land(root, *files)
    plan = weir(root, "plan", "--json", "--at", "2026-01-05")
    assert plan.exit_code == 0, plan.output
    [entry] = json.loads(plan.output)
    assert [i["window"] for i in entry["due"]] == ["2026-01-01T00:00+00:00", "2026-01-02T00:00+00:00"]
    tick = weir(root, "tick", "--at", "2026-01-05")
    assert tick.exit_code == 0, tick.output
    assert sorted(p.name for p in (root / "state" / "out").iterdir()) == ["2026-01-01.csv", "2026-01-02.csv"]
    for command in ("stale", "impact", "plan"):
        result = weir(root, command, "--at", "2026-01-05")
        assert result.exit_code == 0, (command, result.output)
    report = weir(root, "report", "--at", "2026-01-05")
    assert report.exit_code == 0, report.output


def test_one_job_that_cannot_be_planned_does_not_stop_the_others(make_workspace, weir, monkeypatch):
    """Item 1: a planning failure is reported for its job (and the jobs reading it); the rest run."""
    root = make_workspace({
        "good": DAILY + 'inputs: {x: {files: "in/{start:%Y-%m-%d}.csv"}}\n'
                        "steps: [{sql: SELECT COUNT(*) AS n FROM x}]\n"
                        'output: {path: "state/good/{start:%Y-%m-%d}.csv"}\n',
        "broken": DAILY + 'inputs: {x: {files: "in/{start:%Y-%m-%d}.csv"}}\n'
                          "steps: [{sql: SELECT COUNT(*) AS n FROM x}]\n"
                          'output: {path: "state/broken/{start:%Y-%m-%d}.csv"}\n',
        "reader": DAILY + "inputs: {b: {job: broken}}\n"
                          "steps: [{sql: SELECT * FROM b}]\n"
                          'output: {path: "state/reader/{start:%Y-%m-%d}.csv"}\n',
    })
    _land(root, "in/2026-01-01.csv", "in/2026-01-02.csv")
    from runner.core import assessment
    real = assessment.assess_job

    def failing(ws, job, *args, **kwargs):
        if job == "broken":
            raise ValueError("a planning bug")
        return real(ws, job, *args, **kwargs)

    monkeypatch.setattr(assessment, "assess_job", failing)
    tick = weir(root, "tick", "--at", "2026-01-05")
    assert tick.exit_code == 1
    assert "broken could not be planned: ValueError: a planning bug" in tick.output
    assert "reader could not be planned: its producer broken could not be planned" in tick.output
    assert sorted(p.name for p in (root / "state" / "good").iterdir()) == ["2026-01-01.csv", "2026-01-02.csv"]
    assert not (root / "state" / "broken").exists()
    plan = weir(root, "plan", "--json", "--at", "2026-01-05")
    assert plan.exit_code == 1
    errors = {e["job"]: e.get("error") for e in json.loads(plan.stdout)}
    assert errors == {"good": None, "broken": "ValueError: a planning bug",
                      "reader": "its producer broken could not be planned"}
    report = weir(root, "report", "--at", "2026-01-05", "--metrics", str(root / "state" / "metrics.prom"))
    assert report.exit_code == 1
    assert "broken could not be planned" in report.output
    # the exposition parsed by prometheus_client, an independent implementation of the text format
    from prometheus_client.parser import text_string_to_metric_families

    families = {f.name: f for f in text_string_to_metric_families((root / "state" / "metrics.prom").read_text())}
    assert sorted(s.labels["job"] for s in families["weir_job_unplanned"].samples) == ["broken", "reader"]
