"""Every bad job file gets one clear located line through `weir check`, exit 2, no traceback.

Problems are printed as `FILE:LINE:COL: key.path: message`. Line and column
numbers are 1-based and were counted by hand from the YAML text of each case.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from runner.model.loading import load_job

LINE = re.compile(r"^(?P<file>\S+\.ya?ml):(?P<line>\d+):(?P<col>\d+): (?P<rest>.*)$")

GOOD_WINDOW = "window: {every: 1h, start: 2026-01-01, timezone: Europe/Lisbon}"
GOOD_OUTPUT = 'output: {path: "state/out/NAME/{start:%Y-%m-%dT%H%z}.parquet"}'


def job(body: str, name: str = "x") -> str:
    """A job file: `body` plus the parts it leaves out, each valid."""
    text = textwrap.dedent(body).strip("\n") + "\n"
    if not re.search(r"^window:", text, re.M):
        text = GOOD_WINDOW + "\n" + text
    if not re.search(r"^steps:", text, re.M):
        text += "steps: [{sql: SELECT 1 AS rides}]\n"
    if not re.search(r"^output:", text, re.M):
        text += GOOD_OUTPUT.replace("NAME", name) + "\n"
    return text


def problems(result) -> list[re.Match]:
    """The located problem lines of a `weir check` result."""
    return [m for m in (LINE.match(line) for line in result.output.splitlines()) if m]


def check_fails(weir, root: Path, count: int = 1) -> list[re.Match]:
    result = weir(root, "check", "--at", "2026-02-01T00:00Z")
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output and "internal error" not in result.output
    found = problems(result)
    assert len(found) == count, result.output
    assert result.output.rstrip().endswith(f"{count} problem(s) found")
    # nothing but the problem lines and the count
    assert len(result.output.strip().splitlines()) == count + 1, result.output
    return found


def one_problem(weir, make_workspace, name: str, text: str) -> re.Match:
    root = make_workspace({name: text})
    (found,) = check_fails(weir, root)
    assert found["file"].endswith(f"jobs/{name}.yaml")
    return found


# ---------------------------------------------------------------- located problems, exact positions


def test_malformed_yaml_is_located_at_the_offending_token(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly", """\
        window:
          every: 1h
          start: 2026-01-01
        steps:
          - sql: SELECT 1 AS rides
         output: {path: out/x.parquet}
    """)
    # line 6, column 2: the mis-indented `output` key
    assert (found["line"], found["col"]) == ("6", "2")
    assert found["rest"].startswith("malformed YAML:")


def test_unknown_key_names_its_path_and_suggests_the_nearest_valid_key(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly", """\
        window:
          every: 1h
          start: 2026-01-01
          timezon: Europe/Lisbon
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "out/{start:%Y-%m-%dT%H}.parquet"}
    """)
    assert (found["line"], found["col"]) == ("4", "3")  # the key itself
    assert found["rest"] == "window.timezon: unknown key 'timezon' (did you mean 'timezone'?)"


def test_unknown_top_level_key_suggests_the_nearest_one(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly", job("""\
        retrys: 3
    """))
    assert (found["line"], found["col"]) == ("2", "1")
    assert found["rest"] == "retrys: unknown key 'retrys' (did you mean 'retries'?)"


def test_unknown_timezone_is_located_at_its_value_with_the_nearest_name(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly", """\
        window:
          every: 1h
          start: 2026-01-01
          timezone: Europe/Lisbn
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "out/{start:%Y-%m-%dT%H%z}.parquet"}
    """)
    assert (found["line"], found["col"]) == ("4", "13")
    assert found["rest"].startswith("window.timezone: unknown timezone 'Europe/Lisbn'")
    assert "did you mean 'Europe/Lisbon'?" in found["rest"]


def test_bad_duration_is_located_at_its_value_and_shows_how_to_write_one(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly", """\
        window:
          every: 1h
          start: 2026-01-01
          settle: 10 minutes
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "out/{start:%Y-%m-%dT%H}.parquet"}
    """)
    assert (found["line"], found["col"]) == ("4", "11")
    assert found["rest"].startswith("window.settle: bad duration '10 minutes'")
    assert "10m" in found["rest"] and "PT10M" in found["rest"]


@pytest.mark.parametrize(("text", "path", "words"), [
    ("retries: many", "retries", "valid integer"),
    ("steps: SELECT 1", "steps", "valid list"),
    ("inputs: [rides, docks]", "inputs", "valid dictionary"),
    ("output: out.parquet", "output", "dictionary"),
    ("window: {every: 1h, start: 2026-01-01, timezone: [Europe/Lisbon]}", "window.timezone", "valid string"),
    ("window: {every: 1h, start: 2026-01-01}\ninputs: {rides: {files: a.csv, required: maybe}}",
     "inputs.rides.required", "valid boolean"),
])
def test_wrong_type_is_one_line_naming_the_key(weir, make_workspace, text, path, words):
    found = one_problem(weir, make_workspace, "rides_hourly", job(text, "rides_hourly"))
    assert found["rest"].startswith(f"{path}: ")
    assert words in found["rest"]


@pytest.mark.parametrize("cron", ["61 * * * *", "0 25 * * *", "0 0 * * * *", "every hour", "0 0 32 * *"])
def test_invalid_cron_is_one_line_showing_the_five_fields(weir, make_workspace, cron):
    found = one_problem(weir, make_workspace, "rides_hourly", job(f"""\
        window: {{cron: "{cron}", start: 2026-01-01}}
    """))
    assert (found["line"], found["col"]) == ("1", "16")
    assert found["rest"].startswith(f"window.cron: bad cron expression '{cron}'")
    assert "minute hour day-of-month month day-of-week" in found["rest"]


@pytest.mark.parametrize("every", ["0h", "1x", "h", "1.5h", "-1d", "1 month"])
def test_bad_cadence_is_one_line_with_the_units(weir, make_workspace, every):
    found = one_problem(weir, make_workspace, "rides_hourly", job(f"""\
        window: {{every: "{every}", start: 2026-01-01}}
    """))
    assert found["rest"].startswith(f"window.every: bad cadence '{every}'")
    assert "15m, 1h, 1d, 1mo" in found["rest"]


def test_end_before_start_is_refused(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_daily", job("""\
        window: {every: 1d, start: 2026-02-01, end: 2026-01-01}
    """))
    assert found["rest"].startswith("window")
    assert "end 2026-01-01 is not after start 2026-02-01" in found["rest"]


def test_bad_start_timestamp_is_one_line_with_an_example(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_daily", job("""\
        window: {every: 1d, start: 2026-02-30}
    """))
    assert (found["line"], found["col"]) == ("1", "28")
    assert found["rest"].startswith("window.start: bad timestamp '2026-02-30'")


def test_missing_required_keys_are_named(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_daily", """\
        window: {start: 2026-01-01}
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "out/{start:%Y-%m-%d}.parquet"}
    """)
    assert found["rest"] == "window: give exactly one of every: or cron:"


@pytest.mark.parametrize("text", ["", "- a\n- list\n", "just text\n", "42\n"])
def test_a_file_that_is_not_a_mapping_is_one_line(weir, make_workspace, text):
    found = one_problem(weir, make_workspace, "rides_daily", text)
    assert (found["line"], found["col"]) == ("1", "1")
    assert "a job file is a YAML mapping" in found["rest"]


@pytest.mark.parametrize(("text", "words"), [
    ("retries: !!int three\n", "cannot read 'three' as int"),    # explicit tag the text does not fit
    ("? [a, b]\n: 1\n", "a key must be a plain value"),         # a complex key
    ("a: &x 1\nb: *y\n", "undefined alias"),
    ('window: {every: 1h, start: "2026-01-01}\n', "malformed YAML"),
    ("window:\n\tevery: 1h\n", "'\\t'"),
])
def test_odd_yaml_is_a_located_problem_not_a_crash(weir, make_workspace, text, words):
    found = one_problem(weir, make_workspace, "rides_daily", text)
    assert words in found["rest"]


def test_a_file_that_is_not_utf8_is_one_line(weir, make_workspace):
    root = make_workspace({})
    (root / "jobs" / "rides_daily.yaml").write_bytes(b"\xff\xfe window: {}")
    (found,) = check_fails(weir, root)
    assert "cannot read job file" in found["rest"]


def test_a_key_given_twice_is_reported(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_daily", job("""\
        description: first
        description: second
    """))
    assert (found["line"], found["col"]) == ("3", "1")
    assert found["rest"].startswith("description: key given twice")


# ---------------------------------------------------------------- the graph


def test_a_cycle_is_reported_once_with_its_path(weir, make_workspace):
    root = make_workspace({
        "a": job("inputs:\n  from_b: {job: b}\nsteps: [{sql: SELECT * FROM from_b}]\n", "a"),
        "b": job("inputs:\n  from_a: {job: a}\nsteps: [{sql: SELECT * FROM from_a}]\n", "b"),
    })
    (found,) = check_fails(weir, root)
    assert found["file"].endswith("jobs/b.yaml")
    assert (found["line"], found["col"]) == ("3", "17")  # b's `job: a`
    assert "cycle a -> b -> a" in found["rest"]


def test_a_three_job_cycle_shows_the_whole_loop(weir, make_workspace):
    root = make_workspace({
        "a": job("inputs:\n  up: {job: c}\nsteps: [{sql: SELECT * FROM up}]\n", "a"),
        "b": job("inputs:\n  up: {job: a}\nsteps: [{sql: SELECT * FROM up}]\n", "b"),
        "c": job("inputs:\n  up: {job: b}\nsteps: [{sql: SELECT * FROM up}]\n", "c"),
    })
    (found,) = check_fails(weir, root)
    assert "cycle a -> b -> c -> a" in found["rest"]


def test_a_job_reading_its_own_earlier_window_is_not_a_cycle(weir, make_workspace):
    root = make_workspace({"dock_fleet": """\
        window: {every: 1d, start: 2026-01-01, timezone: Europe/Lisbon}
        inputs:
          changes: {files: "state/landing/docks/{start:%Y-%m-%d}.ndjson", schema: {dock: str, delta: int}}
          before: {job: dock_fleet, lag: 1}
        steps:
          - sql: SELECT dock, SUM(delta) AS bikes FROM changes GROUP BY dock
        output: {path: "state/warehouse/dock_fleet/{start:%Y-%m-%d}.parquet"}
    """})
    result = weir(root, "check", "--at", "2026-02-01T00:00Z")
    assert result.exit_code == 0, result.output
    assert "cycle" not in result.output


def test_a_job_reading_its_own_current_window_is_a_cycle(weir, make_workspace):
    found = one_problem(weir, make_workspace, "dock_fleet", job("""\
        inputs:
          before: {job: dock_fleet}
        steps: [{sql: SELECT * FROM before}]
    """, "dock_fleet"))
    assert (found["line"], found["col"]) == ("3", "17")
    assert "cycle dock_fleet -> dock_fleet" in found["rest"] and "lag: 1" in found["rest"]


def test_unknown_producer_suggests_the_nearest_job(weir, make_workspace):
    root = make_workspace({
        "rides_hourly": job("", "rides_hourly"),
        "rides_daily": job("inputs:\n  hourly: {job: rides_hourli}\nsteps: [{sql: SELECT * FROM hourly}]\n",
                           "rides_daily"),
    })
    (found,) = check_fails(weir, root)
    assert found["file"].endswith("jobs/rides_daily.yaml")
    assert (found["line"], found["col"]) == ("3", "17")
    assert found["rest"] == ("inputs.hourly.job: unknown producer job 'rides_hourli' "
                             "(did you mean 'rides_hourly'?)")


def test_two_jobs_writing_the_same_output_template_are_refused(weir, make_workspace):
    same = 'output: {path: "state/out/{start:%Y-%m-%dT%H%z}.parquet"}\n'
    root = make_workspace({"rides_a": job(same), "rides_b": job(same)})
    (found,) = check_fails(weir, root)
    assert found["file"].endswith("jobs/rides_b.yaml")
    assert found["rest"].startswith("output.path: job 'rides_a' already writes")


def test_an_output_template_mapping_two_windows_to_one_file_is_refused(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly", job("""\
        output: {path: "state/out/{start:%Y-%m-%d}.parquet"}
    """))
    assert found["rest"].startswith("output.path: windows 2026-01-01T00:00+00:00 and 2026-01-01T01:00+00:00 "
                                    "would both write state/out/2026-01-01.parquet")


def test_an_hourly_template_without_offset_collides_on_the_fall_back_night(weir, make_workspace):
    # zoneinfo: 2026-10-25 01:00 happens twice in Lisbon; %H alone cannot tell them apart
    found = one_problem(weir, make_workspace, "rides_hourly", job("""\
        window: {every: 1h, start: 2026-10-01, timezone: Europe/Lisbon}
        output: {path: "state/out/{start:%Y-%m-%d/%H}.parquet"}
    """))
    assert "2026-10-25T01:00+01:00 and 2026-10-25T01:00+00:00" in found["rest"]
    assert "%z" in found["rest"]


# ---------------------------------------------------------------- SQL resolved without data

RIDES = """\
window: {every: 1h, start: 2026-01-01, timezone: Europe/Lisbon}
inputs:
  rides:
    files: "state/landing/rides/{start:%Y-%m-%d}/*.csv"
    schema: {zone: str, fare: str, amount: float}
steps:
  - sql: SQL
output: {path: "state/out/{start:%Y-%m-%dT%H%z}.parquet"}
"""


def test_undefined_table_in_sql_lists_what_the_step_can_read(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly",
                        RIDES.replace("SQL", "SELECT zone, COUNT(*) AS rides FROM ridez GROUP BY zone"))
    assert (found["line"], found["col"]) == ("7", "10")
    assert found["rest"].startswith("steps.0.sql: table 'ridez' is not defined")
    assert "rides" in found["rest"] and "bounds" in found["rest"]


def test_unknown_column_is_reported_when_schemas_are_declared(weir, make_workspace):
    found = one_problem(weir, make_workspace, "rides_hourly",
                        RIDES.replace("SQL", "SELECT zone, SUM(price) AS revenue FROM rides GROUP BY zone"))
    assert found["rest"].startswith("steps.0.sql: unknown column")
    assert "price" in found["rest"]


def test_unknown_column_of_an_input_without_schema_is_not_guessed(weir, make_workspace):
    root = make_workspace({"rides_hourly": RIDES.replace(
        "    schema: {zone: str, fare: str, amount: float}\n", "").replace(
        "SQL", "SELECT zone, SUM(price) AS revenue FROM rides GROUP BY zone")})
    assert weir(root, "check", "--at", "2026-02-01T00:00Z").exit_code == 0


@pytest.mark.parametrize("call", ["read_csv('state/landing/rides.csv')", "read_parquet('x.parquet')",
                                  "READ_NDJSON('x.json')"])
def test_sql_reading_files_by_itself_is_refused(weir, make_workspace, call):
    found = one_problem(weir, make_workspace, "rides_hourly", RIDES.replace("SQL", f"SELECT * FROM {call}"))
    assert found["rest"].startswith("steps.0.sql: SQL reads files itself")
    assert "declare the files under inputs:" in found["rest"]


def test_a_file_function_name_inside_a_string_or_comment_is_not_refused(weir, make_workspace):
    sql = "SELECT zone, 'read_csv(x)' AS note FROM rides -- not read_csv(y)"
    root = make_workspace({"rides_hourly": RIDES.replace("SQL", json.dumps(sql))})
    result = weir(root, "check", "--at", "2026-02-01T00:00Z")
    assert result.exit_code == 0, result.output


# ---------------------------------------------------------------- all problems together


def test_every_problem_of_every_file_is_reported_in_one_run(weir, make_workspace):
    root = make_workspace({
        "rides_hourly": """\
            window: {evry: 1h, start: 2026-01-01, timezone: Europe/Lisbn}
            steps: [{sql: SELECT 1 AS rides}]
            output: {path: "state/out/h/{start:%Y-%m-%dT%H%z}.parquet", formt: csv}
            retries: -1
        """,
        "rides_daily": """\
            window: {every: 1d, start: 2026-01-01}
            inputs:
              hourly: {job: rides_hourli}
            steps: [{sql: SELECT * FROM hourly}]
            output: {path: "state/out/d/{start:%Y-%m}.parquet"}
        """,
        "dock_fleet": RIDES.replace("SQL", "SELECT * FROM docks").replace("/out/", "/fleet/"),
        "dock_daily": job("window: {every: 1d, start: 2026-01-01, settle: soon}"),
        "broken": "window: [\n",
    })
    found = check_fails(weir, root, count=9)
    got = {(Path(m["file"]).name, m["line"], m["col"], m["rest"].split(":")[0]) for m in found}
    assert got == {
        ("broken.yaml", "2", "1", "malformed YAML"),
        ("dock_fleet.yaml", "7", "10", "steps.0.sql"),
        ("dock_daily.yaml", "1", "48", "window.settle"),
        ("rides_daily.yaml", "3", "17", "inputs.hourly.job"),
        ("rides_daily.yaml", "5", "16", "output.path"),          # 1d windows, monthly file names
        ("rides_hourly.yaml", "1", "10", "window.evry"),
        ("rides_hourly.yaml", "1", "49", "window.timezone"),
        ("rides_hourly.yaml", "3", "61", "output.formt"),
        ("rides_hourly.yaml", "4", "10", "retries"),
    }
    # sorted by file, then position
    keys = [(m["file"], int(m["line"]), int(m["col"])) for m in found]
    assert keys == sorted(keys)


def test_a_broken_workspace_fails_the_same_way_as_a_subprocess(tmp_path):
    (tmp_path / "jobs").mkdir()
    (tmp_path / "jobs" / "rides_hourly.yaml").write_text(job("window: {every: 1h, start: 2026-01-01, timezone: Mars/Base}"))
    proc = subprocess.run([sys.executable, "-m", "runner", "-C", str(tmp_path), "check"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    assert proc.stdout == ""
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 2 and lines[-1] == "1 problem(s) found"
    assert LINE.match(lines[0]) and "window.timezone: unknown timezone 'Mars/Base'" in lines[0]
    assert "Traceback" not in proc.stderr


# ---------------------------------------------------------------- YAML implicit typing tamed


@pytest.mark.parametrize("typed", ["no", "on", "yes", "off", "2026-01-01", "01", "1.10", "0x1F", "1e3", "NO"])
def test_a_string_field_keeps_exactly_what_was_typed(weir, make_workspace, typed):
    # YAML 1.1 would read these as booleans, dates and numbers (no -> false,
    # 2026-01-01 -> a date, 01 -> 1); a string field keeps the text as typed.
    root = make_workspace({"rides_daily": job(f"description: {typed}\n")})
    result = weir(root, "check", "--json", "--at", "2026-02-01T00:00Z")
    assert result.exit_code == 0, result.output
    (summary,) = json.loads(result.stdout)["jobs"]
    assert summary["description"] == typed


def test_yaml_1_1_booleans_stay_strings_in_lists(tmp_path):
    file = tmp_path / "rides_hourly.yaml"
    file.write_text(job("""\
        inputs:
          rides:
            files: "state/landing/{start:%Y-%m-%d}.csv"
            schema:
              fare: {type: str, values: [no, on, off, 01]}
    """))
    values = load_job(file).spec.inputs["rides"].columns["fare"].values
    # YAML 1.1 would give False, True, False; the YAML 1.2 core schema keeps strings
    assert values[:3] == ["no", "on", "off"]
    assert [type(v) for v in values[:3]] == [str, str, str]


@pytest.mark.parametrize("start", ["2026-01-01", "2026-01-01T00:00", "2026-01-01 00:00:00", "'2026-01-01'"])
def test_window_start_accepts_a_date_or_a_local_timestamp(weir, make_workspace, start):
    root = make_workspace({"rides_daily": job(f"""\
        window: {{every: 1d, start: {start}, timezone: Europe/Lisbon}}
        output: {{path: "state/out/{{start:%Y-%m-%d}}.parquet"}}
    """)})
    result = weir(root, "check", "--json", "--at", "2026-01-03T00:00Z")
    assert result.exit_code == 0, result.output
    (summary,) = json.loads(result.stdout)["jobs"]
    # zoneinfo: Lisbon is UTC+00:00 in January
    assert summary["first_window"] == "2026-01-01T00:00+00:00"
    assert summary["windows_due"] == 2  # 1 and 2 January have ended by the 3rd, 00:00 UTC


# ---------------------------------------------------------------- paths that cannot name a file (issue 9)


@pytest.mark.parametrize(("template", "words"), [
    ("state/out/{start.year}.parquet", "unknown placeholder {start.year}"),
    ("state/out/{start.__class__}.parquet", "unknown placeholder {start.__class__}"),
    ("state/out/{start!r}.parquet", "needs a strftime format"),
    ("state/out/" + "n" * 256 + "/{start:%Y-%m-%dT%H%z}.parquet", "a file or folder name of 256 bytes"),
    ("state/" + "d/" * 2100 + "{start:%Y-%m-%dT%H%z}.parquet", "a path of 4,"),
])
def test_an_output_template_that_cannot_name_a_file_is_refused(weir, make_workspace, template, words):
    """Hardening item 8 (case2_236): only {start:FMT}/{end:FMT}; names <= 255 bytes, paths <= 4,096 (Linux limits)."""
    found = one_problem(weir, make_workspace, "rides_hourly", job(f'output: {{path: "{template}"}}'))
    assert found["rest"].startswith("output.path: ") and words in found["rest"], found["rest"]


@pytest.mark.parametrize(("files", "refused"), [
    ("/etc/passwd", True),
    ("state/landing/rides/{start:%Y-%m-%d}", True),
    ("state/landing/rides/{start:%Y-%m-%d}/*", False),  # a glob: each file's own name decides
    ("state/landing/rides/{start:%Y-%m-%d}.csv.gz", False),
])
def test_a_file_input_whose_name_says_no_format_needs_format(weir, make_workspace, files, refused):
    """Hardening item 8 (case3_21): passed check, then failed every window with 'cannot tell the format'."""
    text = job(f'inputs:\n  rides: {{files: "{files}"}}\nsteps: [{{sql: SELECT 1 AS n FROM rides}}]\n')
    root = make_workspace({"rides_hourly": text})
    result = weir(root, "check", "--at", "2026-02-01T00:00Z")
    if refused:
        assert result.exit_code == 2 and "inputs.rides: cannot tell the format of" in result.output, result.output
    else:
        assert result.exit_code == 0, result.output


@pytest.mark.parametrize("inputs", [
    '  rides: {files: "a/{start:%Y}/*.csv"}\n  Rides: {files: "b/{start:%Y}/*.csv"}\n',
])
def test_names_that_differ_only_in_case_are_refused(weir, make_workspace, inputs):
    """Found with hardening item 9: polars finds tables without regard to case (FROM RIDES reads rides)."""
    found = one_problem(weir, make_workspace, "rides_hourly", job(f"inputs:\n{inputs}"))
    assert "differ only in case" in found["rest"]


def test_a_step_named_like_an_input_in_another_case_is_refused(weir, make_workspace):
    """Found with hardening item 9: a step `RIDES` would shadow the input `rides` in polars' SQL."""
    found = one_problem(weir, make_workspace, "rides_hourly", job(
        'inputs:\n  rides: {files: "a/{start:%Y}/*.csv"}\n'
        "steps: [{sql: SELECT 1 AS n FROM rides, name: RIDES}]\n"))
    assert "step name 'RIDES' is already an input, step or reserved name" in found["rest"]
