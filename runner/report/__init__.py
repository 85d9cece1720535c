"""`weir report`: the morning page (one self-contained HTML file) and the Prometheus metrics.

- `data`: what the page shows, collected from one survey of the ledger and the inputs
- `encoding`: compact column encodings for the per-window figures
- `svg`: the drawings
- `page`: the page, from the files in `assets/` and the data
- `metrics`: window counts, watermarks and run times in the Prometheus text format

`report(root, at, ...)` is the command as a Python call. The modules are
imported inside the functions, so importing this package costs nothing.
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from runner.core.workspace import Workspace
    from runner.io.ledger.store import Ledger


def build_report(ws: Workspace, ledger: Ledger, at: datetime) -> str:
    """The whole page as one self-contained HTML file, for the clock `at`."""
    from runner.report.data import collect
    from runner.report.page import render

    return render(collect(ws, ledger, at))


def report(root: Path | str, at: datetime, ledger_url: str | None = None, out: Path | str | None = None,
           metrics: Path | str | None = None) -> dict[str, Any]:
    """Write the page of the workspace at `root` for the clock `at` (and the metrics file when asked).

    `out` defaults to `state/report.html` in the workspace; both files are
    replaced atomically. Returns where they were written, their sizes, and the
    window counts per state (weir's shown names) over all jobs.
    """
    from runner.core.paths import REPORT
    from runner.engine.loading import load_workspace
    from runner.io.files import write_atomic
    from runner.io.ledger.store import open_ledger
    from runner.report.data import collect
    from runner.report.page import render

    ws = load_workspace(root, thorough=False)
    ledger = open_ledger(ws.root, ledger_url, create=False)
    try:
        data = collect(ws, ledger, at)
        page = render(data)
        target = Path(out) if out is not None else ws.path(REPORT)
        write_atomic(target, page)
        result: dict[str, Any] = {
            "report": str(target), "bytes": len(page.encode("utf-8")), "jobs": len(data.jobs),
            "windows": sum(v.total for v in data.jobs),
            "counts": data.totals(),
            "late": sum(v.late for v in data.jobs),
            "overdue": sum(v.overdue for v in data.jobs),
            "metrics": None,
            "unplanned": dict(getattr(data.assessed, "unplanned", {})),
        }
        if metrics is not None:
            from runner.report.metrics import metrics_text

            text = metrics_text(ws, ledger, at, data=data)
            write_atomic(Path(metrics), text)
            result["metrics"] = str(metrics)
        return result
    finally:
        ledger.dispose()
