"""Outputs are compared by what they resolve to, and weir's own files are no output (hardening item 6).

Two outputs that alias each other (tables `totals` and `Totals` in one SQLite file; one database
spelled as two URLs; two file templates rendering the same path in some window) let only the
last writer survive. Every command that loads the workspace refuses them with a located problem.

Independent witnesses: Python's sqlite3 (which table names SQLite treats as one), SQLAlchemy's
URL parser (which URLs name one database file), the C library's strftime through Python's
datetime (`%F` is `%Y-%m-%d`, as C99 and POSIX define it), SQLAlchemy's PostgreSQL dialect (which
names it quotes), and the file system (nothing written).
"""

from __future__ import annotations

import os
import re
import sqlite3
import textwrap
from datetime import datetime
from pathlib import Path

import pytest
import sqlalchemy as sa
from conftest_run import AT, cli

LINE = re.compile(r"^(?P<file>\S+\.ya?ml):(?P<line>\d+):(?P<col>\d+): (?P<rest>.*)$")


def table_job(database: str, table: str) -> str:
    return textwrap.dedent(f"""\
        window: {{every: 1d, start: 2026-01-01, end: 2026-01-08}}
        steps:
          - sql: SELECT 1 AS rides FROM bounds
        output:
          database: "{database}"
          table: {table}
        """)


def file_job(path: str, window: str = "{every: 1d, start: 2026-01-01, end: 2026-02-01}") -> str:
    return textwrap.dedent(f"""\
        window: {window}
        steps:
          - sql: SELECT 1 AS rides FROM bounds
        output:
          path: "{path}"
        """)


def workspace(root: Path, jobs: dict[str, str]) -> Path:
    (root / "jobs").mkdir(parents=True)
    (root / "state").mkdir()
    for name, text in jobs.items():
        (root / "jobs" / f"{name}.yaml").write_text(text)
    return root


def located(root: Path, *args: str) -> list[re.Match]:
    """The located problem lines of a command that must refuse the workspace (exit 2, no traceback)."""
    result = cli(root, *args)
    assert result.exit_code == 2, (args, result.stdout, result.stderr)
    text = result.stdout + result.stderr
    assert "Traceback" not in text and "internal error" not in text
    return [m for m in (LINE.match(line) for line in text.splitlines()) if m]


def one_problem(root: Path) -> re.Match:
    (found,) = located(root, "check", "--at", AT)
    return found


def passes(root: Path) -> None:
    result = cli(root, "check", "--at", AT)
    assert result.exit_code == 0, result.stdout + result.stderr


# ---------------------------------------------------------------- tables


def test_two_table_names_sqlite_treats_as_one_are_refused(tmp_path: Path):
    """Hardening item 6: tables `totals` and `Totals` in one SQLite database passed `weir check`."""
    con = sqlite3.connect(":memory:")  # sqlite3: SQLite names ignore ASCII case, even quoted
    con.execute('CREATE TABLE "totals" (x)')
    with pytest.raises(sqlite3.OperationalError, match="already exists"):
        con.execute('CREATE TABLE "Totals" (x)')
    root = workspace(tmp_path / "ws", {"daily_a": table_job("sqlite:///state/wh.sqlite", "totals"),
                                       "daily_b": table_job("sqlite:///state/wh.sqlite", "Totals")})
    found = one_problem(root)
    assert found["file"].endswith("jobs/daily_b.yaml") and (found["line"], found["col"]) == ("6", "10")
    assert found["rest"].startswith("output.table: job 'daily_a' already writes this table (as 'totals'")


def test_table_names_sqlite_keeps_apart_pass(tmp_path: Path):
    con = sqlite3.connect(":memory:")  # sqlite3: case beyond ASCII is not folded in names
    con.execute('CREATE TABLE "Ärger" (x)')
    con.execute('CREATE TABLE "ärger" (x)')
    root = workspace(tmp_path / "ws", {"daily_a": table_job("sqlite:///state/wh.sqlite", "Ärger"),
                                       "daily_b": table_job("sqlite:///state/wh.sqlite", "ärger"),
                                       "daily_c": table_job("sqlite:///state/wh.sqlite", "totals")})
    passes(root)


def test_postgresql_table_names_differing_in_case_are_two_tables(tmp_path: Path):
    # SQLAlchemy quotes a name with a capital for PostgreSQL, which then keeps its case
    from sqlalchemy.dialects import postgresql

    quote = postgresql.dialect().identifier_preparer.quote
    assert (quote("Totals"), quote("totals")) == ('"Totals"', "totals")
    url = "postgresql://weir@db.example:5432/rollups"
    root = workspace(tmp_path / "ws", {"daily_a": table_job(url, "totals"), "daily_b": table_job(url, "Totals")})
    passes(root)
    other = "postgresql+psycopg://weir@DB.example/rollups"  # the same server and database, spelled otherwise
    (root / "jobs" / "daily_b.yaml").write_text(table_job(other, "totals"))
    assert one_problem(root)["rest"].startswith("output.table: job 'daily_a' already writes this table")


@pytest.mark.parametrize("second", ["sqlite:///./state/wh.sqlite", "sqlite:///state//wh.sqlite",
                                    "sqlite+pysqlite:///state/wh.sqlite", "sqlite:///state/../state/wh.sqlite",
                                    "ABSOLUTE"])
def test_one_sqlite_file_spelled_as_two_urls_is_one_database(tmp_path: Path, second: str):
    """Hardening item 6: `sqlite:///state/wh.sqlite` and `sqlite:///./state/wh.sqlite` passed as two."""
    root = tmp_path / "ws"
    if second == "ABSOLUTE":
        second = f"sqlite:///{root / 'state' / 'wh.sqlite'}"
    # SQLAlchemy's URL parser: both name the same file once made relative to the workspace
    first_file = sa.engine.make_url("sqlite:///state/wh.sqlite").database
    second_file = sa.engine.make_url(second).database
    assert os.path.normpath(os.path.join(root, first_file)) == os.path.normpath(os.path.join(root, second_file))
    workspace(root, {"daily_a": table_job("sqlite:///state/wh.sqlite", "totals"),
                     "daily_b": table_job(second, "totals")})
    assert one_problem(root)["rest"].startswith("output.table: job 'daily_a' already writes this table")


# ---------------------------------------------------------------- files


def test_two_templates_rendering_the_same_path_are_refused(tmp_path: Path):
    """Hardening item 6: `{start:%Y-%m-%d}` and `{start:%F}` rendered to the same files and both passed."""
    day = datetime(2026, 1, 1)
    assert day.strftime("%F") == day.strftime("%Y-%m-%d")  # the C library's strftime (C99 and POSIX)
    root = workspace(tmp_path / "ws", {
        "daily_a": file_job("state/out/{start:%Y-%m-%d}.csv"),
        "daily_b": file_job("state/./out//{start:%F}.csv"),
    })
    found = one_problem(root)
    assert found["file"].endswith("jobs/daily_b.yaml")
    assert found["rest"] == ("output.path: job 'daily_a' already writes state/out/2026-01-01.csv (its window "
                             "2026-01-01T00:00+00:00; here window 2026-01-01T00:00+00:00); each output "
                             "belongs to one job")


def test_two_jobs_colliding_in_one_window_only_are_refused(tmp_path: Path):
    # daily_b's first window, [2026-01-30, 2026-01-31), ends where daily_a's last window starts
    root = workspace(tmp_path / "ws", {
        "daily_a": file_job("state/out/{start:%Y-%m-%d}.csv", "{every: 1d, start: 2026-01-01, end: 2026-02-01}"),
        "daily_b": file_job("state/out/{end:%Y-%m-%d}.csv", "{every: 1d, start: 2026-01-30, end: 2026-03-01}"),
    })
    found = one_problem(root)
    assert found["rest"].startswith("output.path: job 'daily_a' already writes state/out/2026-01-31.csv "
                                    "(its window 2026-01-31T00:00+00:00; here window 2026-01-30T00:00+00:00)")


def test_templates_that_never_meet_pass(tmp_path: Path):
    root = workspace(tmp_path / "ws", {
        "daily_a": file_job("state/out/{start:%Y-%m-%d}.csv", "{every: 1d, start: 2026-01-01, end: 2026-02-01}"),
        "daily_b": file_job("state/out/{start:%Y-%m-%d}.csv", "{every: 1d, start: 2026-02-01, end: 2026-03-01}"),
        "daily_c": file_job("state/out/{start:%Y-%m-%d}.parquet"),
    })
    passes(root)


def test_a_file_output_onto_a_table_outputs_database_is_refused(tmp_path: Path):
    root = workspace(tmp_path / "ws", {
        "daily_a": table_job("sqlite:///state/wh.sqlite", "totals"),
        "once": file_job("state/./wh.sqlite", "{every: 1d, start: 2026-01-01, end: 2026-01-02}"),
    })
    found = one_problem(root)
    assert found["file"].endswith("jobs/once.yaml")
    assert "state/wh.sqlite, the database of job 'daily_a'" in found["rest"]


def test_checking_outputs_renders_a_plain_template_vectorized_not_window_by_window(tmp_path: Path, monkeypatch):
    """Hardening item 6: a year of windows is compared without rendering each window in Python."""
    from runner.core import paths, validation
    from runner.model.loading import load_job

    root = workspace(tmp_path / "ws", {
        "hourly_a": file_job("state/out/{start:%F/%H}.csv", "{every: 1h, start: 2026-01-01, end: 2027-01-01}"),
        "hourly_b": file_job("state/out/{start:%Y-%m-%d/%H}.csv", "{every: 1h, start: 2026-01-01, end: 2027-01-01}"),
    })
    jobs = {name: load_job(root / "jobs" / f"{name}.yaml") for name in ("hourly_a", "hourly_b")}
    calls = []
    monkeypatch.setattr(paths, "render", lambda *a: calls.append(a) or "")
    found = validation.output_problems(jobs, root)
    assert calls == []
    assert [p.message.split(" (")[0] for p in found] == ["job 'hourly_a' already writes state/out/2026-01-01/00.csv"]


# ---------------------------------------------------------------- weir's own files


@pytest.mark.parametrize("path, what", [
    ("state/ledger.sqlite", "the ledger"),
    ("state/./ledger.sqlite-wal", "the ledger's write-ahead log"),
    ("state/logs/{start:%Y-%m-%d}.csv", "the logs"),
    ("state/tick-gate.json", "the idle tick's gate"),
    ("state/report.html", "the report"),
    ("state/input-checks.sqlite", "the record of checked input files"),
    ("jobs/{start:%Y-%m-%d}.yaml", "the job files"),
])
def test_an_output_onto_a_file_weir_keeps_is_refused(tmp_path: Path, path: str, what: str):
    """Hardening item 6: `output: {path: state/ledger.sqlite}` passed and replaced the ledger with Parquet."""
    root = workspace(tmp_path / "ws", {"once": file_job(path, "{every: 1d, start: 2026-01-01, end: 2026-01-02}")})
    found = one_problem(root)
    assert found["rest"].startswith(f"output.path: output path {path!r} writes ")
    assert f"which weir keeps for itself ({what})" in found["rest"]


def test_a_table_output_in_the_ledgers_database_is_refused(tmp_path: Path):
    root = workspace(tmp_path / "ws", {"daily_a": table_job("sqlite:///state/./ledger.sqlite", "totals")})
    found = one_problem(root)
    assert found["rest"].startswith("output.database: database 'sqlite:///state/./ledger.sqlite' is "
                                    "state/ledger.sqlite, which weir keeps for itself (the ledger)")


def test_every_command_that_loads_the_workspace_refuses_aliasing_outputs_and_writes_nothing(tmp_path: Path):
    """Hardening item 6: the refusal is not `weir check`'s alone: running commands refuse too."""
    root = workspace(tmp_path / "ws", {"daily_a": table_job("sqlite:///state/wh.sqlite", "totals"),
                                       "daily_b": table_job("sqlite:///./state/wh.sqlite", "TOTALS")})
    commands = [("check", "--at", AT), ("plan", "--at", AT), ("tick", "--at", AT),
                ("backfill", "daily_a", "--at", AT), ("run", "daily_a", "--window", "2026-01-01"),
                ("stale", "--at", AT), ("verify",)]
    for args in commands:
        found = located(root, *args)
        assert [m["rest"].split(":")[0] for m in found] == ["output.table"], args
    assert sorted(p.name for p in (root / "state").iterdir()) == []  # no ledger, no database, no gate


def test_a_sqlite_url_naming_its_driver_is_resolved_in_the_workspace_not_the_current_folder(tmp_path, monkeypatch):
    """Hardening item 6: URLs are read with SQLAlchemy's parser, not by their prefix; a relative
    `sqlite+pysqlite:///` path was taken relative to the current folder, outside the workspace."""
    root = workspace(tmp_path / "ws", {"daily_a": table_job("sqlite+pysqlite:///state/wh.sqlite", "totals")})
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    result = cli(root, "tick", "--at", AT)
    assert result.exit_code == 0, result.stdout + result.stderr
    assert list(elsewhere.iterdir()) == []
    con = sqlite3.connect(root / "state" / "wh.sqlite")  # sqlite3 reads what weir wrote: 7 days, 1 row each
    assert con.execute("SELECT COUNT(*) FROM totals").fetchone() == (7,)
    con.close()


@pytest.mark.parametrize("template", ["state/{start:%F}/{start:%T}.csv", "state/{start:%D}-{end:%R}.csv",
                                      "state/{start:%%F}/{start:%F%z}.csv", "state/{end:%Y%m%dT%H%M%S}.csv"])
def test_outputs_rendered_for_many_windows_at_once_equal_pythons_strftime(template: str):
    """Hardening item 6: the vectorized renderings the comparison relies on match the C library's
    strftime, through Python's datetime, window by window (Lisbon, across the 2026 clock changes)."""
    from zoneinfo import ZoneInfo

    from runner.core.paths import output_paths
    from runner.core.windows import Cadence

    lisbon = ZoneInfo("Europe/Lisbon")
    cad = Cadence("1h", None, lisbon, datetime(2026, 3, 28, tzinfo=lisbon), datetime(2026, 10, 27, tzinfo=lisbon))
    span = cad.span()
    _, rendered = output_paths(template, span, most=10)  # `most` bounds only the window-by-window route
    assert len(rendered) == len(span) > 10  # so every window was rendered at once
    expected = [template.format(start=w.start.astimezone(lisbon), end=w.end.astimezone(lisbon)) for w in span]
    assert rendered.to_list() == expected
