"""The docs agree with the program: the CLI reference, the job-file reference, the README."""

from __future__ import annotations

import re
from pathlib import Path

import clidoc
from pydantic import BaseModel

from runner.model import columns, settings, spec

ROOT = Path(__file__).resolve().parent.parent


def test_cli_reference_matches_every_commands_help():
    assert (ROOT / "docs" / "cli.md").read_text() == clidoc.render(), "run: python tests/clidoc.py"


def _field_names(model: type[BaseModel]) -> set[str]:
    return {info.alias or name for name, info in model.model_fields.items()}


def test_job_file_reference_names_every_key_of_every_model():
    text = (ROOT / "docs" / "jobs.md").read_text()
    documented = set(re.findall(r"`([a-z_]+)`", text))
    models = [spec.JobSpec, spec.WindowDecl, spec.FileInput, spec.JobInput, spec.DatabaseInput, columns.Column,
              spec.SqlStep, spec.PythonStep, spec.Output, spec.OutputCheck, spec.RowsCheck, spec.ChangeCheck,
              settings.WorkspaceSettings]
    missing = {f"{m.__name__}.{f}" for m in models for f in _field_names(m) if f not in documented}
    assert not missing


def test_docs_link_to_pages_that_exist():
    for page in (ROOT / "docs").glob("*.md"):
        for target in re.findall(r"\]\(([^)#]+\.md)", page.read_text()):
            assert (page.parent / target).exists(), f"{page.name} links to missing {target}"
