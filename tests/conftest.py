"""Shared fixtures: temporary workspaces and a runner for the CLI."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest
from click.testing import CliRunner

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


__all__ = ["cli"]
