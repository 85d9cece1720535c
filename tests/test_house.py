"""The house rules that tools check: import layers without cycles (import-linter), types (mypy),
module size, and a wheel that carries every file the package reads.

The layers and the acyclic contract are declared in pyproject.toml
([tool.importlinter]) and explained in DEVELOPERS.md; mypy's settings are
there too ([tool.mypy]).
"""

from __future__ import annotations

import ast
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
MOST_LINES = 500  # past this a module says in its docstring why it is one module


def _tool(name: str) -> str:
    found = shutil.which(name, path=str(Path(sys.executable).parent))
    assert found, f"{name} is not installed: pip install -e '.[test]'"
    return found


def test_imports_keep_the_layers_and_have_no_cycle():
    proc = subprocess.run([_tool("lint-imports"), "--no-cache"], cwd=ROOT, capture_output=True, text=True,
                          timeout=600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "0 broken" in proc.stdout


def test_the_package_type_checks_clean_with_mypy():
    proc = subprocess.run([sys.executable, "-m", "mypy", "--no-incremental"], cwd=ROOT, capture_output=True,
                          text=True, timeout=900)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert proc.stdout.startswith("Success: no issues found")


def test_every_module_past_500_lines_says_why_in_its_docstring():
    long = []
    for path in sorted((ROOT / "runner").rglob("*.py")):
        text = path.read_text()
        if text.count("\n") <= MOST_LINES:
            continue
        doc = ast.get_docstring(ast.parse(text)) or ""
        if "One module because" not in doc:
            long.append(f"{path.relative_to(ROOT)} ({text.count(chr(10))} lines)")
    assert long == []


def test_the_wheel_carries_every_data_file_of_the_package(tmp_path):
    """The report's page, style and script and the starter workspace's templates are package data:
    a wheel must carry each file in runner/ that is not Python (an editable install reads them from
    the source tree and would hide a missing package-data line in pyproject.toml)."""
    src = tmp_path / "src"
    shutil.copytree(ROOT / "runner", src / "runner", ignore=shutil.ignore_patterns("__pycache__"))
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    done = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--no-index",
                           "-q", "-w", str(tmp_path / "dist"), str(src)], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    [wheel] = (tmp_path / "dist").glob("weir-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    data = sorted(p.relative_to(ROOT).as_posix() for p in (ROOT / "runner").rglob("*")
                  if p.is_file() and p.suffix not in (".py", ".pyc") and "__pycache__" not in p.parts)
    assert "runner/report/assets/report.js" in data and "runner/scaffold/templates/rides_per_hour.yaml" in data
    assert [name for name in data if name not in names] == []
