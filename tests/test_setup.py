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


def _generated(entry: Path) -> bool:
    """Entries a checkout gains by being used: virtual environments, caches, build output."""
    return (entry.name in {"__pycache__", "build", "dist"} or entry.name.endswith(".egg-info")
            or (entry.is_dir() and (entry / "pyvenv.cfg").exists()))


def test_top_level_layout_is_exactly_the_agreed_one():
    """The top level is fixed (README, guide, licence, packaging, package, jobs, tests, state, docs, CI);
    virtual environments and build output a checkout gains by being used do not count."""
    present = {p.name for p in ROOT.iterdir()
               if (not p.name.startswith(".") or p.name == ".ci") and not _generated(p)}
    assert present == {"README.md", "DEVELOPERS.md", "LICENSE", "pyproject.toml", "runner", "jobs", "tests",
                       "state", "docs", ".ci"}


def test_the_licence_file_is_the_one_pyproject_names():
    """pyproject.toml says MIT; the LICENSE file carries the MIT licence text (opening line from memory of
    the OSI's published text)."""
    import tomllib

    meta = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert meta["license"] == {"text": "MIT"}
    assert (ROOT / "LICENSE").read_text().startswith("MIT License\n")
