"""`weir check` on the example workspace and on broken job files."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_check_reports_every_problem_with_file_line_column_and_exit_2(weir, make_workspace):
    root = make_workspace({
        "a": """
            window: {evry: 1h, start: 2026-01-01}
            steps: [{sql: SELECT 1 AS x}]
            output: {path: out/a.parquet}
        """,
        "b": """
            window: {every: 1h, start: 2026-01-01, timezone: Europe/Lisbn}
            steps: [{sql: SELECT 1 AS x}]
            output: {path: "out/b/{start:%Y-%m-%d/%H}.parquet"}
        """,
    })
    result = weir(root, "check")
    assert result.exit_code == 2
    lines = [ln for ln in result.output.splitlines() if ln.startswith("jobs/") or "/jobs/" in ln]
    assert any("a.yaml:2:" in ln and "window.evry" in ln and "did you mean 'every'" in ln for ln in lines)
    assert any("b.yaml:2:" in ln and "Europe/Lisbon" in ln for ln in lines)
    assert "Traceback" not in result.output
