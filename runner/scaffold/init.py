"""`weir init`: a new workspace with jobs/, state/ and one commented example job."""

from __future__ import annotations

import string
from datetime import datetime
from importlib import resources
from pathlib import Path

from runner.errors import UsageError

TEMPLATES = "runner.scaffold"  # package data: templates/rides_per_hour.yaml and templates/state_README.md


def template(name: str) -> str:
    """A file of `templates/` (package data), as text."""
    return resources.files(TEMPLATES).joinpath("templates", name).read_text(encoding="utf-8")


def init(target: Path | str, now: datetime) -> list[str]:
    """Create a new workspace with jobs/, state/ and one commented example job; return what was written."""
    root = Path(target)
    jobs = root / "jobs"
    example = jobs / "rides_per_hour.yaml"
    if jobs.is_dir() and any(jobs.iterdir()):
        raise UsageError(f"{jobs} already has job files; weir init only starts new workspaces")
    written = []
    jobs.mkdir(parents=True, exist_ok=True)
    (root / "state").mkdir(exist_ok=True)
    start = now.strftime("%Y-%m-%dT00:00")
    example.write_text(string.Template(template("rides_per_hour.yaml")).substitute(start=start))
    written.append(str(example))
    readme = root / "state" / "README.md"
    if not readme.exists():
        readme.write_text(template("state_README.md"))
        written.append(str(readme))
    gitignore = root / "state" / ".gitignore"
    if not gitignore.exists():
        gitignore.write_text("*\n!.gitignore\n!README.md\n")
        written.append(str(gitignore))
    return written
