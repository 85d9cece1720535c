"""`weir report` as a Python call: the HTML report and, optionally, the metrics file."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import Any

from runner.paths import REPORT


def report(root: Path | str, at: datetime, ledger_url: str | None = None, out: Path | str | None = None,
           metrics: Path | str | None = None) -> dict[str, Any]:
    """Write the HTML report of the workspace at `root` for the clock `at` (and the metrics file when asked).

    `out` defaults to `state/report.html` in the workspace; both files are
    replaced atomically. Returns where they were written, their sizes, and the
    window counts per state over all jobs.
    """
    from runner.api import open_ledger
    from runner.report import ORDER, collect, render, write_report
    from runner.workspace import load_workspace

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    try:
        data = collect(ws, ledger, at)
        page = render(data)
        target = Path(out) if out is not None else ws.path(REPORT)
        write_report(target, page)
        result: dict[str, Any] = {
            "report": str(target), "bytes": len(page.encode("utf-8")), "jobs": len(data.jobs),
            "windows": sum(v.total for v in data.jobs),
            "counts": {s: sum(v.counts.get(s, 0) for v in data.jobs) for s in ORDER},
            "late": sum(v.late for v in data.jobs),
            "metrics": None,
            "unplanned": dict(getattr(data.assessed, "unplanned", {})),
        }
        if metrics is not None:
            from runner.metrics import metrics_text

            text = metrics_text(ws, ledger, at, assessed=data.assessed)
            write_report(Path(metrics), text)
            result["metrics"] = str(metrics)
        return result
    finally:
        ledger.dispose()
