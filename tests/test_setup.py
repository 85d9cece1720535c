"""The project's set-up promises: README commands and CI run the same test command."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_ci_runs_exactly_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```sh\n(.*?)\n```", readme, re.S)
    test_command = blocks[1].strip()
    ci_lines = [line.strip() for line in (ROOT / ".ci" / "run").read_text().splitlines()]
    assert "pytest" in test_command
    assert test_command in ci_lines


def test_top_level_layout_is_exactly_the_agreed_one():
    tracked = {p.name for p in ROOT.iterdir() if not p.name.startswith(".") or p.name == ".ci"}
    tracked -= {"__pycache__", "build", "dist"}
    tracked = {t for t in tracked if not t.endswith(".egg-info")}
    assert tracked == {"README.md", "DEVELOPERS.md", "pyproject.toml", "runner", "jobs", "tests", "state",
                       "docs", ".ci"}
