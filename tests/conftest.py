"""Shared fixtures: temporary workspaces, a runner for the CLI, real servers (tests/servers.py)."""

from __future__ import annotations

import os
import textwrap
from pathlib import Path

import pytest
from click.testing import CliRunner
from servers import (  # real servers on loopback: see tests/servers.py
    _dask_session,
    dask_cluster,
    http_receiver,
    make_pg_database,
    pg_url,
    postgres_server,
)

from runner.cli import cli


@pytest.fixture
def make_workspace(tmp_path: Path):
    """Write job files (name -> YAML text) into a new workspace; return its root."""

    def make(jobs: dict[str, str], root: Path | None = None) -> Path:
        base = root or tmp_path / "ws"
        (base / "jobs").mkdir(parents=True, exist_ok=True)
        (base / "state").mkdir(exist_ok=True)
        for name, text in jobs.items():
            (base / "jobs" / f"{name}.yaml").write_text(textwrap.dedent(text))
        return base

    return make


@pytest.fixture
def weir():
    """Invoke the CLI in-process: weir(root, "check", ...) -> click Result."""

    def invoke(root: Path, *args: str):
        from runner.cli import main

        runner = CliRunner()
        return runner.invoke(_Main(main), ["-C", str(root), *args], catch_exceptions=False)

    return invoke


class _Main:
    """Adapter so CliRunner exercises `main` (error rendering and exit codes included)."""

    def __init__(self, main):
        self._main = main
        self.name = "weir"

    def main(self, args, prog_name=None, **extra):
        self._main(list(args))


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    """Under CI (`WEIR_NO_SKIPS=1`, set by .ci/run) a skipped test is a failed one.

    Tests that need a real server or browser skip with a reason on a machine
    without it; CI installs everything, so a skip there means a missing install step.
    """
    outcome = yield
    report = outcome.get_result()
    if os.environ.get("WEIR_NO_SKIPS") == "1" and report.skipped and not hasattr(report, "wasxfail"):
        reason = report.longrepr[2] if isinstance(report.longrepr, tuple) else str(report.longrepr)
        report.outcome = "failed"
        report.longrepr = f"skipped under CI (WEIR_NO_SKIPS=1), which must run every test: {reason}"


__all__ = [
    "_dask_session",
    "cli",
    "dask_cluster",
    "http_receiver",
    "make_pg_database",
    "pg_url",
    "postgres_server",
]
